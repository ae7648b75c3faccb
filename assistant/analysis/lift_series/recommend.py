"""Recommended lift height and bias from a decomposed series."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Recommendation", "recommend_lift"]


@dataclass(frozen=True)
class Recommendation:
    """Attributes
    ----------
    lift_height_m : float or None
        Lowest measured height meeting every criterion; None when none does.
    bias_v : float or None
        Bias that nulls the electrostatic part (V_cpd), bias grid only.
    criteria : dict of ndarray (H,) bool
        ``short_range_ok``, ``residual_ok``, ``magnetic_ok`` per height.
    resolution_period_m : ndarray (H,)
        Shortest resolved spatial period per height (the resolution cost of the height) [m].
    sentence : str
    """

    lift_height_m: float | None
    bias_v: float | None
    criteria: dict
    resolution_period_m: np.ndarray
    sentence: str


def recommend_lift(*, heights_m, magnetic_rms, magnetic_rms_std, short_range, residual_ok,
                   resolution_period_m, short_range_fraction: float = 0.1, cpd_v: float | None = None,
                   significance: float = 3.0) -> Recommendation:
    """Lowest measured height where the short-range part is at most ``short_range_fraction`` of the magnetic
    contrast (rms), the continuation residual is at noise level and the magnetic contrast is ``significance``
    standard errors above zero. Any consistent unit for the contrasts. Rule: common practice, no source.
    """
    h = np.asarray(heights_m, float)
    mag = np.asarray(magnetic_rms, float)
    sr_ok = np.abs(np.asarray(short_range, float)) <= short_range_fraction * mag
    mag_ok = mag > significance * np.asarray(magnetic_rms_std, float)
    res_ok = np.asarray(residual_ok, bool)
    good = sr_ok & mag_ok & res_ok
    res = np.asarray(resolution_period_m, float)
    if np.any(good):
        i = int(np.argmax(good))
        lift = float(h[i])
        per = f"; shortest resolved period there {res[i] * 1e9:.3g} nm" if np.isfinite(res[i]) else ""
        sentence = (f"Use a lift height of {lift * 1e9:.4g} nm: the lowest measured height where the short-range "
                    f"part is at most {short_range_fraction:.0%} of the magnetic contrast and the continuation "
                    f"residual is at noise level{per}.")
    else:
        lift = None
        why = []
        if not np.any(sr_ok):
            why.append("the short-range part exceeds the limit at every height")
        if not np.any(res_ok):
            why.append("the continuation residual is above noise at every height")
        if not np.any(mag_ok):
            why.append("no height shows significant magnetic contrast")
        if not why:
            why.append("no single height meets all criteria at once")
        sentence = "No measured height qualifies: " + "; ".join(why) + "."
    if cpd_v is not None:
        sentence += f" Set the tip bias to {cpd_v:.3g} V (V_cpd) to null the electrostatic part."
    return Recommendation(lift, cpd_v, {"short_range_ok": sr_ok, "residual_ok": res_ok, "magnetic_ok": mag_ok},
                          res, sentence)
