"""The tip models the heights-only split averages over: their geometry and operation, and their shapes.

Each candidate is a tip (exact sphere series, Smythe 1968, or the Hudlet et al. 1998 apex, Eur. Phys. J. B 2,
5; with their cone or none; apex and van der Waals radii each within their uncertainty) at an amplitude and a
gap offset: a stated offset with its standard uncertainty sigma is taken at itself and sqrt(3/2) sigma either
side, three offsets of equal prior weight whose variance is sigma^2, so that the spread of the split over them
is the offset's uncertainty propagated (the tip models are averaged with equal priors, :mod:`.mean_parts`).
A candidate whose oscillating tip comes closer to the surface than :data:`MIN_CLOSEST_APPROACH_M` at the
lowest height is left out while others remain: there the continuum models (the Hamaker sphere, Hamaker
1937, Physica 4, 1058; the image-charge series) no longer describe a tip, and such a candidate fitted stage
means best with a repulsive short-range part (10 nm lift, 19.7 nm amplitude, offset half of it: 0.18 nm).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import image_mean_models as lm
from .probe import ASSUMED_AMPLITUDE_M

__all__ = ["TipCandidate", "candidates", "shapes", "AMPLITUDE_RANGE_FACTOR", "GAP_OFFSET_LOW_FRACTION",
           "GAP_OFFSET_STEPS", "GAP_OFFSET_SPREAD", "MIN_CLOSEST_APPROACH_M"]

AMPLITUDE_RANGE_FACTOR = 2.0  # small and large amplitude: a factor of two either way (no source)
GAP_OFFSET_LOW_FRACTION = 0.5   # lowest first-pass setpoint ratio considered when the offset is not given
GAP_OFFSET_STEPS = 11            # offsets tried from that fraction of the amplitude to all of it, evenly spaced
GAP_OFFSET_SPREAD = float(np.sqrt(1.5))  # a stated offset's neighbours, in its standard uncertainties
# closest approach below which a tip model is not plausible: a few atomic spacings, where contact forces and
# the atomic structure take over from the continuum forces (common practice, no source)
MIN_CLOSEST_APPROACH_M = 1e-9


@dataclass(frozen=True)
class TipCandidate:
    """One tip model of the average: geometry and operation, its fit and its weight."""

    cone_half_angle_deg: float | None
    radius_m: float                 # of the electrostatic apex
    short_range_radius_m: float     # of the van der Waals sphere
    amplitude_m: float
    gap_offset_m: float
    reduced_chi2: float = float("nan")
    weight: float = 0.0
    hudlet_apex: bool = False       # the apex as Hudlet et al.'s closed form instead of the exact sphere series

    def closest_approach_m(self, lift_height_m: float) -> float:
        """Lowest point of the oscillating tip above the surface at that lift height [m]."""
        return float(lift_height_m) + self.gap_offset_m - self.amplitude_m

    def to_dict(self) -> dict:
        return {"cone_half_angle_deg": self.cone_half_angle_deg, "hudlet_apex": float(self.hudlet_apex),
                "radius_nm": self.radius_m * 1e9,
                "short_range_radius_nm": self.short_range_radius_m * 1e9, "amplitude_nm": self.amplitude_m * 1e9,
                "gap_offset_nm": self.gap_offset_m * 1e9, "reduced_chi2": self.reduced_chi2, "weight": self.weight}


def candidates(*, radius_m, radius_rel_std, cone_half_angle_deg, amplitude_m, gap_offset_m,
               gap_offset_std_m: float | None = None):
    """Every combination of cone, apex model, both radii, amplitude and gap offset (a stated offset with a
    standard uncertainty: it and :data:`GAP_OFFSET_SPREAD` uncertainties either side)."""
    # the electrostatic and the short-range radius vary independently: the apex that the field lines see
    # (coating, cone, contamination) need not be the sphere that the van der Waals force sees, and with one
    # radius for both an apex model that the set lacks (Hudlet's, on 256 x 256 synthetic crops) was matched
    # by a wrong radius that carried the short-range part 3.6 of its uncertainties off
    cones = [cone_half_angle_deg if cone_half_angle_deg is not None else 15.0, None]
    radii = [radius_m * (1.0 - radius_rel_std), radius_m, radius_m * (1.0 + radius_rel_std)]
    amps = ([amplitude_m] if amplitude_m is not None
            else [ASSUMED_AMPLITUDE_M / AMPLITUDE_RANGE_FACTOR, ASSUMED_AMPLITUDE_M,
                  ASSUMED_AMPLITUDE_M * AMPLITUDE_RANGE_FACTOR])
    out = []
    for amp in amps:
        if gap_offset_m is None:
            gaps = list(np.linspace(GAP_OFFSET_LOW_FRACTION, 1.0, GAP_OFFSET_STEPS) * amp)
        elif gap_offset_std_m:
            gaps = [gap_offset_m + j * GAP_OFFSET_SPREAD * gap_offset_std_m for j in (-1, 0, 1)]
        else:
            gaps = [gap_offset_m]
        for gap in gaps:
            for cone in cones:
                for r in radii:
                    for rv in radii:
                        for hudlet in (False, True):
                            out.append(TipCandidate(cone, float(r), float(rv), float(amp), float(gap),
                                                    hudlet_apex=hudlet))
    return out


def _electrostatic(z, c: TipCandidate, cone_height_m: float):
    """``1/2 C''(z)`` of a candidate tip: the exact sphere series (Smythe 1968) or Hudlet et al.'s closed-form
    apex (1998, Eur. Phys. J. B 2, 5), with or without their cone."""
    if not c.hudlet_apex:
        return 0.5 * lm.tip_capacitance_second_derivative_f_per_m2(
            z, radius_m=c.radius_m, cone_half_angle_deg=c.cone_half_angle_deg, cone_height_m=cone_height_m)
    angle = 0.0 if c.cone_half_angle_deg is None else c.cone_half_angle_deg
    out = lm.hudlet_apex_gradient_n_per_m(z, radius_m=c.radius_m, voltage_v=1.0, cone_half_angle_deg=angle)
    if c.cone_half_angle_deg is not None:
        out = out + lm.hudlet_cone_gradient_n_per_m(z, radius_m=c.radius_m, voltage_v=1.0,
                                                    cone_half_angle_deg=angle, cone_height_m=cone_height_m)
    return out


def shapes(cands, heights_m, cone_height_m):
    """Normalised electrostatic and short-range shapes (M, H) of the candidates that keep the tip off the
    surface (each shape computed once), those candidates, and whether any came within
    :data:`MIN_CLOSEST_APPROACH_M` (then only such candidates were left)."""
    h0 = float(np.min(heights_m))
    off = [c for c in cands if c.closest_approach_m(h0) > 0.0]
    clear = [c for c in off if c.closest_approach_m(h0) >= MIN_CLOSEST_APPROACH_M]
    too_close = not clear and bool(off)
    cache, keep, es, ss = {}, [], [], []

    def shape(key, fun, dc, amp):
        if key not in cache:
            v = lm.amplitude_weighted(fun, dc, amplitude_m=amp)
            cache[key] = v / v[0]
        return cache[key]

    for c in clear or off:
        dc = lm.centre_gap_m(heights_m, amplitude_m=c.amplitude_m, gap_offset_m=c.gap_offset_m)
        op = (c.amplitude_m, c.gap_offset_m)
        es.append(shape(("e", c.hudlet_apex, c.cone_half_angle_deg, c.radius_m) + op,
                        lambda z, c=c: _electrostatic(z, c, cone_height_m), dc, c.amplitude_m))
        ss.append(shape(("s", c.short_range_radius_m) + op, lambda z, c=c: lm.vdw_sphere_gradient_n_per_m(
            z, hamaker_j=1.0, radius_m=c.short_range_radius_m), dc, c.amplitude_m))
        keep.append(c)
    return keep, np.array(es), np.array(ss), too_close
