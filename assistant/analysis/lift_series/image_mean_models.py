"""Image-mean models of a lift series: electrostatic and van der Waals gradients of the tip, their average over
the oscillation, and the gap the tip oscillates at.

Sign convention as in :mod:`.phase`: ``F' = dF/dz`` with ``z`` the tip-sample gap, so an attractive force that
strengthens on approach has ``F' > 0``.

Gap convention of a second pass: the centre of the tip's oscillation sits ``gap_offset_m + lift_height_m``
above the surface and the tip swings ``amplitude_m`` (peak) either side of it. ``gap_offset_m`` defaults
to ``amplitude_m``, so that the closest approach equals the lift height; a series recorded under amplitude
feedback knows it better (:func:`first_pass_gap_offset_m`).
"""

from __future__ import annotations

import numpy as np

from assistant.errors import InputError

from .probe import ProbeModel

EPSILON_0_F_PER_M = 8.8541878188e-12  # CODATA 2022
# Standard uncertainty of the setpoint rule's gap offset (first_pass_gap_offset_m). The rule is the hard-contact
# limit: the tip touches the surface at the bottom of each tapping cycle. A real cycle's lowest point lies below
# contact by the indentation of a hard film (a few tenths of a nm) or above it where the attractive forces alone
# hold the amplitude at the setpoint (the attractive regime, about a nanometre; Garcia & San Paulo 1999,
# Phys. Rev. B 60, 4961, from memory): 0.5 nm either way as one standard uncertainty (common practice, no source)
FIRST_PASS_GAP_OFFSET_STD_M = 0.5e-9

__all__ = [
    "EPSILON_0_F_PER_M",
    "sphere_capacitance_f",
    "sphere_capacitance_derivatives",
    "sphere_electrostatic_gradient_n_per_m",
    "hudlet_apex_force_n",
    "hudlet_apex_gradient_n_per_m",
    "hudlet_cone_force_n",
    "hudlet_cone_gradient_n_per_m",
    "tip_capacitance_second_derivative_f_per_m2",
    "vdw_sphere_force_n",
    "vdw_sphere_gradient_n_per_m",
    "amplitude_weighted",
    "centre_gap_m",
    "first_pass_gap_offset_m",
    "FIRST_PASS_GAP_OFFSET_STD_M",
    "image_mean_shapes",
]


def _alpha(gap_m: np.ndarray, radius_m: float) -> np.ndarray:
    # cosh(alpha) = 1 + z/R; arccosh loses precision for z << R, so use log1p form
    u = np.asarray(gap_m, dtype=float) / radius_m
    return np.log1p(u + np.sqrt(u * (u + 2.0)))


def _n_terms(alpha_min: float, n_terms: int | None) -> int:
    if n_terms is not None:
        return int(n_terms)
    # terms fall off like exp(-n alpha); 40/alpha leaves exp(-40) ~ 4e-18
    return int(min(max(np.ceil(40.0 / max(alpha_min, 1e-12)), 8), 200_000))


def _series_terms(gap_m, radius_m: float, n_terms: int | None):
    z = np.atleast_1d(np.asarray(gap_m, dtype=float))
    if np.any(~(z > 0)):
        raise InputError(f"gap_m must be > 0 m for the sphere-plane series, got min {np.min(z)!r}")
    if not radius_m > 0:
        raise InputError(f"radius_m must be > 0 m, got {radius_m!r}")
    a = _alpha(z, radius_m)
    n = np.arange(1, _n_terms(float(a.min()), n_terms) + 1, dtype=float)
    x = a[..., None] * n  # n alpha
    e2 = np.exp(-2.0 * x)
    csch = 2.0 * np.exp(-x) / (1.0 - e2)  # overflow-free 1/sinh
    coth = (1.0 + e2) / (1.0 - e2)
    return z, a, n, csch, coth


def sphere_capacitance_f(gap_m, *, radius_m: float, n_terms: int | None = None) -> np.ndarray:
    """Capacitance of a conducting sphere above a grounded plane (exact image-charge series).

    ``C = 4 pi eps0 R sinh(alpha) sum_{n>=1} 1/sinh(n alpha)`` with ``cosh(alpha) = 1 + z/R``
    (Smythe, Static and Dynamic Electricity, 1968).

    Parameters
    ----------
    gap_m : array_like
        Sphere-plane gap z [m] (> 0).
    radius_m : float
        Sphere radius R [m].
    n_terms : int, optional
        Number of series terms; by default enough for double precision.

    Returns
    -------
    ndarray
        C [F], shaped like ``gap_m``.
    """
    z, a, n, csch, coth = _series_terms(gap_m, radius_m, n_terms)
    c = 4.0 * np.pi * EPSILON_0_F_PER_M * radius_m * np.sinh(a) * csch.sum(axis=-1)
    return c.reshape(np.shape(gap_m))


def sphere_capacitance_derivatives(gap_m, *, radius_m: float, n_terms: int | None = None):
    """First and second gap derivatives of the exact sphere-plane capacitance.

    Term-by-term derivatives of the image-charge series (Smythe 1968):
    ``dC/dz = 4 pi eps0 sum_n (coth a - n coth na) / sinh(na)`` and ``d2C/dz2`` from its
    alpha-derivative times ``d alpha/dz = 1/(R sinh a)``.

    Parameters
    ----------
    gap_m : array_like
        Gap z [m] (> 0).
    radius_m : float
        Sphere radius R [m].
    n_terms : int, optional
        Number of series terms.

    Returns
    -------
    (ndarray, ndarray)
        dC/dz [F/m] (negative) and d2C/dz2 [F/m^2] (positive), shaped like ``gap_m``.
    """
    z, a, n, csch, coth = _series_terms(gap_m, radius_m, n_terms)
    ca = 1.0 / np.tanh(a)[..., None]
    csch_a = 1.0 / np.sinh(a)[..., None]
    g = (ca - n * coth) * csch  # (coth a - n coth na)/sinh na
    # d/da of g: derivative of the bracket over sinh(na) minus bracket * n coth(na)/sinh(na)
    dg = (-(csch_a**2) + n**2 * csch**2) * csch - g * n * coth
    k = 4.0 * np.pi * EPSILON_0_F_PER_M
    dc = k * g.sum(axis=-1)
    d2c = k * dg.sum(axis=-1) / (radius_m * np.sinh(a))
    shape = np.shape(gap_m)
    return dc.reshape(shape), d2c.reshape(shape)


def sphere_electrostatic_gradient_n_per_m(gap_m, *, radius_m: float, voltage_v: float) -> np.ndarray:
    """Electrostatic force gradient ``F' = 1/2 C''(z) (V - V_cpd)^2`` of the exact sphere [N/m].

    ``voltage_v`` is the effective voltage ``V - V_cpd`` [V].
    """
    _, d2c = sphere_capacitance_derivatives(gap_m, radius_m=radius_m)
    return 0.5 * d2c * voltage_v**2


def _hudlet_a(radius_m: float, cone_half_angle_deg: float) -> float:
    return radius_m * (1.0 - np.sin(np.radians(cone_half_angle_deg)))


def hudlet_apex_force_n(gap_m, *, radius_m: float, voltage_v: float, cone_half_angle_deg: float = 0.0):
    """Apex (sphere) force of the Hudlet et al. tip model [N].

    ``F = -pi eps0 V^2 R^2 (1 - sin t0) / (z [z + R (1 - sin t0)])``
    (Hudlet, Saint Jean, Guthmann & Berger 1998, Eur. Phys. J. B 2, 5; formula from memory).
    """
    z = np.asarray(gap_m, dtype=float)
    a = _hudlet_a(radius_m, cone_half_angle_deg)
    return -np.pi * EPSILON_0_F_PER_M * voltage_v**2 * radius_m * a / (z * (z + a))


def hudlet_apex_gradient_n_per_m(gap_m, *, radius_m: float, voltage_v: float,
                                 cone_half_angle_deg: float = 0.0):
    """z-derivative of :func:`hudlet_apex_force_n` [N/m] (Hudlet et al. 1998)."""
    z = np.asarray(gap_m, dtype=float)
    a = _hudlet_a(radius_m, cone_half_angle_deg)
    return (np.pi * EPSILON_0_F_PER_M * voltage_v**2 * radius_m * a * (2.0 * z + a)
            / (z**2 * (z + a) ** 2))


def _cone_constants(radius_m, voltage_v, cone_half_angle_deg, cone_height_m):
    t = np.radians(cone_half_angle_deg)
    if not 0.0 < t < np.pi / 2:
        raise InputError(f"cone_half_angle_deg must be in (0, 90) deg, got {cone_half_angle_deg!r}")
    if not cone_height_m > 0:
        raise InputError(f"cone_height_m must be > 0 m, got {cone_height_m!r}")
    k = np.pi * EPSILON_0_F_PER_M * voltage_v**2 / np.log(np.tan(t / 2.0)) ** 2
    b = radius_m * np.cos(t) ** 2 / np.sin(t)
    return k, b, _hudlet_a(radius_m, cone_half_angle_deg)


def hudlet_cone_force_n(gap_m, *, radius_m: float, voltage_v: float, cone_half_angle_deg: float,
                        cone_height_m: float):
    """Cone force of the Hudlet et al. tip model [N].

    ``F = -pi eps0 V^2 / ln(tan(t0/2))^2 * {ln[H/(z + R(1 - sin t0))] - 1
    + R cos^2 t0 / sin t0 / (z + R(1 - sin t0))}`` (Hudlet et al. 1998, Eur. Phys. J. B 2, 5;
    formula from memory).
    """
    k, b, a = _cone_constants(radius_m, voltage_v, cone_half_angle_deg, cone_height_m)
    u = np.asarray(gap_m, dtype=float) + a
    return -k * (np.log(cone_height_m / u) - 1.0 + b / u)


def hudlet_cone_gradient_n_per_m(gap_m, *, radius_m: float, voltage_v: float, cone_half_angle_deg: float,
                                 cone_height_m: float):
    """z-derivative of :func:`hudlet_cone_force_n` [N/m]: ``K (1/u + b/u^2)``, ``u = z + R(1 - sin t0)``."""
    k, b, a = _cone_constants(radius_m, voltage_v, cone_half_angle_deg, cone_height_m)
    u = np.asarray(gap_m, dtype=float) + a
    return k * (1.0 / u + b / u**2)


def tip_capacitance_second_derivative_f_per_m2(gap_m, *, radius_m: float,
                                               cone_half_angle_deg: float | None = None,
                                               cone_height_m: float = 10e-6) -> np.ndarray:
    """``C''(z)`` of the tip: exact sphere series plus, optionally, the Hudlet cone term [F/m^2].

    The cone term is ``2 F'_cone / V^2`` of Hudlet et al. 1998; ``cone_half_angle_deg=None`` leaves it out.
    """
    _, d2c = sphere_capacitance_derivatives(gap_m, radius_m=radius_m)
    if cone_half_angle_deg is not None:
        d2c = d2c + 2.0 * hudlet_cone_gradient_n_per_m(
            gap_m, radius_m=radius_m, voltage_v=1.0, cone_half_angle_deg=cone_half_angle_deg,
            cone_height_m=cone_height_m)
    return d2c


def vdw_sphere_force_n(gap_m, *, hamaker_j: float, radius_m: float) -> np.ndarray:
    """Non-retarded van der Waals force of a full sphere over a half-space [N].

    ``F = -2 H R^3 / (3 z^2 (z + 2R)^2)`` (Hamaker 1937, Physica 4, 1058; Israelachvili 2011,
    Intermolecular and Surface Forces; from memory, re-derived from the sphere-plane energy).
    """
    z = np.asarray(gap_m, dtype=float)
    return -2.0 * hamaker_j * radius_m**3 / (3.0 * z**2 * (z + 2.0 * radius_m) ** 2)


def vdw_sphere_gradient_n_per_m(gap_m, *, hamaker_j: float, radius_m: float) -> np.ndarray:
    """``F' = 8 H R^3 (z + R) / (3 z^3 (z + 2R)^3)`` [N/m], the derivative of :func:`vdw_sphere_force_n`."""
    z = np.asarray(gap_m, dtype=float)
    r = radius_m
    return 8.0 * hamaker_j * r**3 * (z + r) / (3.0 * z**3 * (z + 2.0 * r) ** 3)


def centre_gap_m(lift_height_m, *, amplitude_m: float, gap_offset_m: float | None = None) -> np.ndarray:
    """Gap of the oscillation centre during a second pass: ``gap_offset_m + lift_height_m`` [m].

    ``gap_offset_m`` defaults to ``amplitude_m`` (closest approach = lift height).
    """
    off = amplitude_m if gap_offset_m is None else gap_offset_m
    d = np.asarray(lift_height_m, dtype=float) + off
    if np.any(d - amplitude_m <= 0):
        low = float(np.min(np.asarray(lift_height_m, dtype=float)))
        raise InputError(
            f"at a lift height of {low * 1e9:.3g} nm the tip would reach the surface: the oscillation amplitude "
            f"{amplitude_m * 1e9:.3g} nm exceeds the lift height plus the first pass's gap of {off * 1e9:.3g} nm "
            f"above the surface; use a larger lift height or a smaller free amplitude")
    return d


def amplitude_weighted(gradient, centre_gap_m, *, amplitude_m: float, n_nodes: int = 96) -> np.ndarray:
    """Finite-amplitude effective gradient ``<F'>`` of an oscillating tip.

    ``<F'>(d_c) = 2/(pi A^2) * int_{-A}^{A} F'(d_c + q) sqrt(A^2 - q^2) dq`` (Giessibl 2001,
    Appl. Phys. Lett. 78, 123; from memory), evaluated by Gauss-Chebyshev quadrature of the second kind.

    Parameters
    ----------
    gradient : callable
        ``gradient(gap_m) -> F'`` [N/m], vectorised.
    centre_gap_m : array_like
        Gap of the oscillation centre d_c [m].
    amplitude_m : float
        Oscillation amplitude A (peak) [m]; 0 returns ``gradient(centre_gap_m)``.
    n_nodes : int
        Quadrature nodes.

    Returns
    -------
    ndarray
        ``<F'>`` [N/m], shaped like ``centre_gap_m``.
    """
    d = np.asarray(centre_gap_m, dtype=float)
    if amplitude_m == 0:
        return np.asarray(gradient(d), dtype=float)
    if amplitude_m < 0:
        raise InputError(f"amplitude_m must be >= 0 m, got {amplitude_m!r}")
    i = np.arange(1, n_nodes + 1)
    theta = i * np.pi / (n_nodes + 1)
    x = np.cos(theta)
    w = np.pi / (n_nodes + 1) * np.sin(theta) ** 2  # int f(x) sqrt(1-x^2) dx ~ sum w f(x)
    vals = np.asarray(gradient(d[..., None] + amplitude_m * x), dtype=float)
    return (2.0 / np.pi) * (vals * w).sum(axis=-1)


def first_pass_gap_offset_m(amplitude_m: float, setpoint_ratio: float) -> float:
    """Oscillation centre above the surface at zero lift [m], for a series whose first pass ran under amplitude
    feedback: a tapping tip's amplitude is limited by the gap, and the feedback holds it at the setpoint, so
    the centre sits about one setpoint amplitude, ``amplitude_m * setpoint_ratio``, above the surface (a
    model, common practice, no source), to within :data:`FIRST_PASS_GAP_OFFSET_STD_M`."""
    return float(amplitude_m) * float(setpoint_ratio)


def image_mean_shapes(heights_m, probe: ProbeModel) -> tuple[np.ndarray, np.ndarray]:
    """The two image-mean shapes at each lift height, per unit parameter [N/m]: the amplitude-weighted
    ``1/2 C''`` of the tip (times ``(V - V_cpd)^2`` it is the electrostatic gradient) and the amplitude-weighted
    Hamaker sphere gradient per unit Hamaker constant.

    Raises ``ValueError`` where the closest approach of the oscillation would reach the surface.
    """
    amplitude = probe.amplitude_or_assumed_m
    dc = centre_gap_m(heights_m, amplitude_m=amplitude, gap_offset_m=probe.gap_offset_m)
    electrostatic = amplitude_weighted(
        lambda z: 0.5 * tip_capacitance_second_derivative_f_per_m2(
            z, radius_m=probe.tip_radius_m, cone_half_angle_deg=probe.cone_half_angle_deg,
            cone_height_m=probe.cone_height_m),
        dc, amplitude_m=amplitude)
    short_range = amplitude_weighted(
        lambda z: vdw_sphere_gradient_n_per_m(z, hamaker_j=1.0, radius_m=probe.tip_radius_m), dc,
        amplitude_m=amplitude)
    return electrostatic, short_range
