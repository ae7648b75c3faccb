"""First flexural mode as a damped harmonic oscillator in a heat bath, sampled exactly.

The continuous model m x'' + gamma x' + k_m x = F_th(t), with white thermal force of one-sided PSD
4 kB T gamma, is a linear stochastic system whose state (x, v) obeys an exact discrete-time recursion for any
time step (Norrelykke & Flyvbjerg 2011, Phys. Rev. E 83, 041103): X[n+1] = M X[n] + xi[n], M = exp(A dt),
xi Gaussian with covariance C - M C M^T (C the equipartition covariance); at very fine steps it is computed
by Van Loan's matrix exponential instead (Van Loan 1978, IEEE Trans. Autom. Control 23, 395; from memory),
which keeps its digits.
The displacement alone is then an ARMA(2, 1) process; white measurement noise added to every sample keeps it
ARMA(2, 2). Both are factorised into a single scalar filter driven by one unit normal per sample, so a
record is one ``scipy.signal.lfilter`` call per chunk with the filter state carried between chunks. The
sampled spectrum is therefore exactly the aliased continuous spectrum, at any sample rate.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np
from scipy.linalg import cholesky, expm, solve_discrete_lyapunov

KB = 1.380649e-23  # J/K, exact (SI 2019)


def _state_noise(q: float, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Transition matrix and noise covariance over a step h (time in units of 1/omega0, x in units of sigma)."""
    beta = 0.5 / q
    w1 = math.sqrt(1.0 - beta * beta)
    c, s, e = math.cos(w1 * h), math.sin(w1 * h), math.exp(-beta * h)
    # exp(A h) of the underdamped oscillator in closed form
    m = e * np.array([[c + s * beta / w1, s / w1], [-s / w1, c - s * beta / w1]])
    if h > 0.02:
        sigma = np.eye(2) - m @ m.T  # stationary covariance is the identity in these units
    else:  # fine steps: I - M M^T loses digits; Van Loan's block exponential keeps them
        a = np.array([[0.0, 1.0], [-1.0, -2.0 * beta]])
        block = np.zeros((4, 4))
        block[:2, :2] = -a
        block[1, 3] = 2.0 / q  # white force noise that makes the stationary covariance the identity
        block[2:, 2:] = a.T
        g = expm(block * h)
        sigma = g[2:, 2:].T @ g[:2, 2:]
    return m, 0.5 * (sigma + sigma.T)


def _ma_factor(r0: float, r1: float, r2: float) -> np.ndarray:
    """Minimum-phase b with autocovariance (r0, r1, r2) of sum_i b_i u[n-i], u unit white noise."""
    if r2 <= 1e-300 * max(r0, 1e-300) or r2 == 0.0:
        rho = r1 / r0
        theta = 0.0 if rho == 0.0 else (1.0 - math.sqrt(1.0 - 4.0 * rho * rho)) / (2.0 * rho)
        return math.sqrt(r0 / (1.0 + theta * theta)) * np.array([1.0, theta, 0.0])
    roots = np.roots([r2, r1, r0, r1, r2])
    inside = roots[np.argsort(np.abs(roots))[:2]]
    poly = np.real(np.poly(inside))  # [1, -(z1+z2), z1 z2]
    b0 = math.sqrt(r2 / poly[2])
    return b0 * poly


class ThermalMode:
    """Thermal motion of one oscillator mode, streamed in chunks of end displacement [m].

    Parameters
    ----------
    stiffness_n_per_m : float
        Modal stiffness k_m referred to end displacement (k / 0.971 for the first flexural mode, so that the
        end-displacement variance is 0.971 kB T / k; Butt & Jaschke 1995, Nanotechnology 6, 1).
    resonance_hz, quality_factor : float
        Natural frequency f0 and quality factor of the mode.
    temperature_k : float
    rate_hz : float
        Sample rate [Hz].
    rng : numpy.random.Generator
    white_noise_std_m : float, keyword-only
        Standard deviation of white measurement noise added to every sample [m], folded into the same
        filter (exactly, by spectral factorisation).
    output_gain : float, keyword-only
        Factor applied to every output sample (e.g. detector volts per metre), folded into the filter.
    """

    def __init__(self, *, stiffness_n_per_m: float, resonance_hz: float, quality_factor: float,
                 temperature_k: float, rate_hz: float, rng: np.random.Generator,
                 white_noise_std_m: float = 0.0, output_gain: float = 1.0) -> None:
        for name, value in (("stiffness_n_per_m", stiffness_n_per_m), ("resonance_hz", resonance_hz),
                            ("quality_factor", quality_factor), ("temperature_k", temperature_k),
                            ("rate_hz", rate_hz)):
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"{name} = {value!r} must be finite and > 0")
        if quality_factor <= 0.5:
            raise ValueError(f"quality_factor = {quality_factor} must be > 0.5 (underdamped mode)")
        self.stiffness_n_per_m = stiffness_n_per_m
        self.resonance_hz = resonance_hz
        self.quality_factor = quality_factor
        self.temperature_k = temperature_k
        self.rate_hz = rate_hz
        self.white_noise_std_m = white_noise_std_m
        self._rng = rng
        self.sigma_m = math.sqrt(KB * temperature_k / stiffness_n_per_m)
        h = 2 * math.pi * resonance_hz / rate_hz
        m, sig = _state_noise(quality_factor, h)
        t, d = float(np.trace(m)), float(np.linalg.det(m))
        c1, c2 = -m[1, 1], m[0, 1]  # e[j] = xi_x[j] + c1 xi_x[j-1] + c2 xi_v[j-1]
        g0 = sig[0, 0] * (1 + c1 * c1) + c2 * c2 * sig[1, 1] + 2 * c1 * c2 * sig[0, 1]
        g1 = c1 * sig[0, 0] + c2 * sig[0, 1]
        s2 = (white_noise_std_m / self.sigma_m) ** 2
        r0 = g0 + s2 * (1 + t * t + d * d)
        r1 = g1 - s2 * t * (1 + d)
        r2 = s2 * d
        self._a = np.array([1.0, -t, d])
        self._b = output_gain * self.sigma_m * _ma_factor(r0, r1, r2)
        self._u = np.empty(0)
        # stationary start: covariance of the direct-form-II-transposed filter state
        a_s = np.array([[t, 1.0], [-d, 0.0]])
        b_s = np.array([self._b[1] + t * self._b[0], self._b[2] - d * self._b[0]])
        p = solve_discrete_lyapunov(a_s, np.outer(b_s, b_s))
        self._zi = cholesky(0.5 * (p + p.T) + 1e-300 * np.eye(2), lower=True) @ rng.standard_normal(2)

    @property
    def displacement_variance_m2(self) -> float:
        """kB T / k_m, the variance of the mode's displacement (without the added white noise) [m^2]."""
        return self.sigma_m**2

    def next_chunk(self, samples: int) -> np.ndarray:
        """The next ``samples`` values of the record [m] (times ``output_gain``), continuing exactly."""
        from scipy.signal import lfilter  # scipy.signal takes ~1 s to import: only when the stage simulates
        if self._u.size != samples:
            self._u = np.empty(samples)
        u = self._rng.standard_normal(out=self._u)
        y, self._zi = lfilter(self._b, self._a, u, zi=self._zi)
        return y

    def record(self, samples: int, *, chunk: int = 1 << 18) -> Iterator[np.ndarray]:
        """Yield ``samples`` values in chunks of at most ``chunk`` (constant memory)."""
        done = 0
        while done < samples:
            n = min(chunk, samples - done)
            yield self.next_chunk(n)
            done += n
