"""Contact (static) InvOLS from force curves on a hard surface.

In contact with a hard sample the tip follows the piezo, so the deflection change equals the Z travel and
InvOLS = 1/slope of detector volts against Z (Butt, Cappella & Kappl 2005, Surf. Sci. Rep. 59, 1). The
line is fitted to the linear part of the contact region: the points whose piezo position lies where the contact
line is between 20 % and 80 % of the contact deflection range above the free level (excludes snap-in, the first
nanometres and detector non-linearity at large deflection; common practice, no source for the exact fractions).
Approach and retract are fitted separately and their slopes compared (they should agree within 1-2 %).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from assistant.errors import AssistantError, InputError

__all__ = ["ContactInvolsResult", "ForceCurveError", "contact_invols", "stiff_sample_invols"]


class ForceCurveError(AssistantError, ValueError):
    """The force curve cannot be analysed (the message names the quantity and the limit)."""


@dataclass(frozen=True)
class LineFit:
    """Straight line deflection = slope z + intercept over the selected contact points."""

    slope_v_per_m: float
    slope_std_v_per_m: float
    intercept_v: float
    z_range_m: tuple[float, float]
    n_points: int


@dataclass(frozen=True)
class ContactInvolsResult:
    """Static InvOLS [m/V] from approach (and retract) and the slopes behind it."""

    invols_m_per_v: float
    invols_std_m_per_v: float
    approach: LineFit
    retract: LineFit | None
    slope_mismatch: float | None  # |retract| / |approach| - 1
    consistent: bool | None  # |slope_mismatch| <= max_mismatch


def _contact_line(z: np.ndarray, v: np.ndarray, *, free_first: bool, fractions: tuple[float, float],
                  name: str) -> LineFit:
    if z.ndim != 1 or z.shape != v.shape:
        raise ForceCurveError(f"{name}: z and deflection must be 1-D of one length, got {z.shape}, {v.shape}")
    if z.size < 20:
        raise ForceCurveError(f"{name}: {z.size} points, need >= 20")
    if not (np.all(np.isfinite(z)) and np.all(np.isfinite(v))):
        raise ForceCurveError(f"{name}: non-finite values (NaN or infinity)")
    n_free = max(z.size // 5, 3)
    free = np.median(v[:n_free] if free_first else v[-n_free:])
    top = float(np.max(v))
    span = top - free
    noise = float(np.std(v[:n_free] if free_first else v[-n_free:]))
    if not span > 10 * noise or span <= 0:
        raise ForceCurveError(
            f"{name}: contact deflection range {span:.4g} V is not above 10x the free-level noise "
            f"{noise:.4g} V: no contact region")
    lo, hi = free + fractions[0] * span, free + fractions[1] * span
    mask = (v >= lo) & (v <= hi)
    # Largest contiguous run: the contact part, not stray points of the free or adhesive part.
    edges = np.flatnonzero(np.diff(np.concatenate(([0], mask.astype(np.int8), [0]))))
    starts, stops = edges[::2], edges[1::2]
    j = int(np.argmax(stops - starts))
    sl = slice(starts[j], stops[j])
    zs, vs = z[sl], v[sl]
    if zs.size < 5:
        raise ForceCurveError(f"{name}: {zs.size} points in the linear contact region, need >= 5")
    # Points chosen by their own noisy deflection leave out those that noise pushed across the limits, which
    # flattens the line (InvOLS 1.2 % high at 0.03 V of noise on a 1 V contact range). So the limits are taken
    # in z, where a preliminary line crosses them, and every point in that z interval is fitted.
    for _ in range(2):
        coef = np.polyfit(zs, vs, 1)
        if not coef[0] > 0:
            break
        z_lo, z_hi = sorted(((lo - coef[1]) / coef[0], (hi - coef[1]) / coef[0]))
        inside = (z >= z_lo) & (z <= z_hi)
        if np.count_nonzero(inside) < 5:
            break
        zs, vs = z[inside], v[inside]
    coef, cov = np.polyfit(zs, vs, 1, cov="unscaled")
    resid = vs - np.polyval(coef, zs)
    s2 = float(np.sum(resid**2)) / max(zs.size - 2, 1)
    return LineFit(float(coef[0]), float(np.sqrt(cov[0, 0] * s2)), float(coef[1]),
                   (float(np.min(zs)), float(np.max(zs))), int(zs.size))


def contact_invols(z_m: np.ndarray, deflection_v: np.ndarray, *, retract_z_m: np.ndarray | None = None,
                   retract_deflection_v: np.ndarray | None = None, fractions: tuple[float, float] = (0.2, 0.8),
                   max_mismatch: float = 0.02) -> ContactInvolsResult:
    """Static InvOLS from the contact slope of an approach (and optionally a retract) curve.

    Parameters
    ----------
    z_m : ndarray
        Piezo position along the approach, in acquisition order starting away from the surface [m].
    deflection_v : ndarray
        Detector deflection [V] at each position (rising in contact).
    retract_z_m, retract_deflection_v : ndarray, optional
        The retract curve in acquisition order (ending away from the surface).
    fractions : (float, float)
        Part of the contact deflection range used for the line (default 20 %..80 %).
    max_mismatch : float
        Largest relative slope difference approach/retract still called consistent (default 2 %).

    Returns
    -------
    ContactInvolsResult
        InvOLS = 1 / mean |slope| [m/V]; its uncertainty from the slopes' standard errors.
    """
    if not 0 <= fractions[0] < fractions[1] <= 1:
        raise ForceCurveError(f"fractions = {fractions!r} must satisfy 0 <= low < high <= 1")
    app = _contact_line(np.asarray(z_m, float), np.asarray(deflection_v, float), free_first=True,
                        fractions=fractions, name="approach")
    fits = [app]
    ret = None
    if (retract_z_m is None) != (retract_deflection_v is None):
        raise ForceCurveError("give both retract_z_m and retract_deflection_v, or neither")
    if retract_z_m is not None:
        ret = _contact_line(np.asarray(retract_z_m, float), np.asarray(retract_deflection_v, float),
                            free_first=False, fractions=fractions, name="retract")
        fits.append(ret)
    slope = float(np.mean([abs(x.slope_v_per_m) for x in fits]))
    slope_std = float(np.sqrt(sum(x.slope_std_v_per_m**2 for x in fits))) / len(fits)
    mismatch = abs(ret.slope_v_per_m) / abs(app.slope_v_per_m) - 1.0 if ret is not None else None
    return ContactInvolsResult(
        invols_m_per_v=1.0 / slope, invols_std_m_per_v=slope_std / slope**2, approach=app, retract=ret,
        slope_mismatch=None if mismatch is None else float(mismatch),
        consistent=None if mismatch is None else bool(abs(mismatch) <= max_mismatch))


def stiff_sample_invols(measured_invols_m_per_v: float, *, k_n_per_m: float,
                        sample_stiffness_n_per_m: float) -> float:
    """True InvOLS from one measured on a sample of finite contact stiffness k_s [m/V].

    Lever and contact act as springs in series, so the deflection is k_s/(k + k_s) of the Z travel and
    InvOLS_measured = InvOLS_true (1 + k/k_s) (elementary; cf. Butt, Cappella & Kappl 2005).
    """
    for name, value in (("measured_invols_m_per_v", measured_invols_m_per_v), ("k_n_per_m", k_n_per_m),
                        ("sample_stiffness_n_per_m", sample_stiffness_n_per_m)):
        if not (np.isfinite(value) and value > 0):
            raise InputError(f"{name} = {value!r} must be positive and finite")
    return float(measured_invols_m_per_v / (1.0 + k_n_per_m / sample_stiffness_n_per_m))
