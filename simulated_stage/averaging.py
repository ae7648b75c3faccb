"""Finite-amplitude weighting of tip-sample forces over one oscillation cycle.

Tip at d_c + A cos(wt) (d_c = gap at the centre of the oscillation, A = peak amplitude). The effective
gradient that sets the frequency shift and the lift-mode phase is the gradient form of Giessibl:

    <F'> = 2/(pi A^2) * integral_{-A}^{A} F'(d_c + q) sqrt(A^2 - q^2) dq
         = (2/A^2) * <F(d_c + q) q>_cycle   (integration by parts)

(force form: Giessibl 1997, Phys. Rev. B 56, 16010; gradient form: Giessibl 2001, Appl. Phys. Lett. 78, 123)

and Delta f = -f0/(2k) <F'>. The plain time average of the force is (1/pi) integral F / sqrt(A^2 - q^2) dq.
Both integrals are done with Gauss-Chebyshev rules (second / first kind), which absorb the square-root
weights exactly. For the magnetic part every Fourier component decays as exp(-k z), and the weights have
closed forms: <exp(-k(d+q))>_gradient = exp(-k d) 2 I1(kA)/(kA), <exp(-k(d+q))>_time = exp(-k d) I0(kA)
(integral representations of the modified Bessel functions, Abramowitz & Stegun 9.6.18/9.6.19).
"""

from __future__ import annotations

from typing import Callable

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.special import i0e, i1e

ArrayFn = Callable[[np.ndarray], np.ndarray]


def chebyshev_nodes(n: int, kind: int) -> tuple[np.ndarray, np.ndarray]:
    """Nodes x_i in (-1, 1) and weights that integrate f(x) w(x) over [-1, 1] normalised to 1.

    kind=1: w = 1/(pi sqrt(1-x^2)) (time average); kind=2: w = 2 sqrt(1-x^2)/pi (Giessibl gradient weight).
    Both rules are exact for polynomials of degree 2n-1 (Abramowitz & Stegun 25.4.38 and 25.4.40).
    """
    if kind == 1:
        x = np.cos((2.0 * np.arange(1, n + 1) - 1.0) * np.pi / (2.0 * n))
        return x, np.full(n, 1.0 / n)
    if kind == 2:
        theta = np.arange(1, n + 1) * np.pi / (n + 1.0)
        return np.cos(theta), 2.0 / (n + 1.0) * np.sin(theta) ** 2
    raise ValueError(f"kind = {kind} must be 1 or 2")


def weighted_gradient(gradient_fn: ArrayFn, centre_gap_m: np.ndarray, amplitude_m: float, *,
                      nodes: int = 64) -> np.ndarray:
    """Giessibl-weighted effective gradient <F'> [N/m] at centre gaps ``centre_gap_m`` [m].

    ``gradient_fn`` maps an array of gaps [m] to F' [N/m]. A = 0 returns F'(d_c).
    """
    d = np.asarray(centre_gap_m, float)
    if amplitude_m == 0.0:
        return gradient_fn(d)
    x, w = chebyshev_nodes(nodes, 2)
    return np.tensordot(gradient_fn(d[..., None] + amplitude_m * x), w, axes=([-1], [0]))


def averaged_force(force_fn: ArrayFn, centre_gap_m: np.ndarray, amplitude_m: float, *,
                   nodes: int = 64) -> np.ndarray:
    """Time average of F over the cycle [N] at centre gaps ``centre_gap_m`` [m]."""
    d = np.asarray(centre_gap_m, float)
    if amplitude_m == 0.0:
        return force_fn(d)
    x, w = chebyshev_nodes(nodes, 1)
    return np.tensordot(force_fn(d[..., None] + amplitude_m * x), w, axes=([-1], [0]))


def giessibl_force_form(force_fn: ArrayFn, centre_gap_m: np.ndarray, amplitude_m: float, *,
                        nodes: int = 64) -> np.ndarray:
    """<F'> from the force form (2/A^2) <F(d_c + q) q>_cycle, i.e. Delta f = -(f0/(k A^2)) <F q>
    (Giessibl 1997); equal to the gradient form by integration by parts."""
    d = np.asarray(centre_gap_m, float)
    x, w = chebyshev_nodes(nodes, 1)
    q = amplitude_m * x
    return 2.0 / amplitude_m**2 * np.tensordot(force_fn(d[..., None] + q) * q, w, axes=([-1], [0]))


def exponential_gradient_weight(k_per_m: np.ndarray, amplitude_m: float) -> np.ndarray:
    """2 I1(kA)/(kA) times exp(-kA): the scaled Giessibl weight of exp(-k q) (multiply by exp(-k(d - A)))."""
    x = np.asarray(k_per_m, float) * amplitude_m
    out = np.ones_like(x)
    big = x > 1e-6
    out[big] = 2.0 * i1e(x[big]) / x[big]
    out[~big] = np.exp(-x[~big]) * (1.0 + x[~big] ** 2 / 8.0)  # series of 2 I1(x)/x, scaled by exp(-x)
    return out


def exponential_force_weight(k_per_m: np.ndarray, amplitude_m: float) -> np.ndarray:
    """I0(kA) times exp(-kA): the scaled time average of exp(-k q) (multiply by exp(-k(d - A)))."""
    return i0e(np.asarray(k_per_m, float) * amplitude_m)


class AveragedTable:
    """Spline table of <F>(d_c) and <F'>(d_c) at one amplitude for a gap-only force law.

    Built once per amplitude from ``force_fn`` and ``gradient_fn`` (arrays of gaps -> N, N/m) on a grid
    of closest approaches d_min = d_c - A: linear from ``lowest_m`` to 2 nm, geometric from 2 nm to 1 mm.
    Evaluating a 256-point line then costs a few tens of microseconds instead of a quadrature per pixel.
    Beyond the table the force law is evaluated at the clamped end (below) or returns the far-field
    value (above, where everything has decayed to nothing relevant).
    """

    def __init__(self, force_fn: ArrayFn, gradient_fn: ArrayFn, amplitude_m: float, *,
                 lowest_m: float = -3e-9, nodes: int = 256) -> None:
        self.amplitude_m = float(amplitude_m)
        near = np.linspace(lowest_m, 2e-9, 400, endpoint=False)
        far = np.geomspace(2e-9, 1e-3, 700)
        self._dmin = np.concatenate([near, far])
        centre = self._dmin + self.amplitude_m
        # Chunked so that the (grid x nodes) temporary stays small.
        f = np.concatenate([averaged_force(force_fn, c, self.amplitude_m, nodes=nodes)
                            for c in np.array_split(centre, 8)])
        g = np.concatenate([weighted_gradient(gradient_fn, c, self.amplitude_m, nodes=nodes)
                            for c in np.array_split(centre, 8)])
        self._spline = CubicSpline(self._dmin, np.stack([f, g], axis=-1), extrapolate=False)

    def __call__(self, centre_gap_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(<F> [N], <F'> [N/m]) at centre gaps [m]."""
        dmin = np.asarray(centre_gap_m, float) - self.amplitude_m
        both = self._spline(np.clip(dmin, self._dmin[0], self._dmin[-1]))
        far = dmin > self._dmin[-1]
        return np.where(far, 0.0, both[..., 0]), np.where(far, 0.0, both[..., 1])
