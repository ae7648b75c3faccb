"""The image-mean parts on series built from tip models the analysis does not assume.

Series generated here from the published physics (synthetic_series.py): the exact sphere image series alone
(Smythe 1968, Static and Dynamic Electricity), the Hudlet et al. 1998 apex-plus-cone model (Eur. Phys. J. B 2,
5), a gap offset of half the amplitude (a first pass at a setpoint of 0.5) that the analysis is not told, an
amplitude of 20 nm that the analysis is not told (it assumes 10 nm), and a 45 nm tip said to be 30 nm; the
Hamaker sphere (Hamaker 1937) for the short range, Giessibl 2001 averaging, non-periodic crops of a thin film.
None of them is the nominal tip the analysis is given (exact sphere, 15 deg cone, 30 nm, the amplitude and
offset stated); Hudlet's apex is one of the tip models it averages over, since a single-radius sphere set
matched it with a wrong radius (3.1-3.6 uncertainties off on 256 x 256 crops).
Requirement: every reported part lies within 3 of its whole uncertainties (noise and model in quadrature) of
the truth at every height, or the analysis says the parts are not separable. Before this check existed the
split missed by 8-118 of its standard errors on these series while saying "separable" (128 x 128, two
patterns each), and the reported electrostatic plus short-range total missed the measured mean by up to 9 %.
"""

from __future__ import annotations

import numpy as np
import pytest

from assistant.analysis.lift_series import analyse_series
from tests.analysis.lift_series.synthetic_series import build_series

HEIGHTS = np.array([15, 20, 30, 40, 55, 70, 90, 110]) * 1e-9
SCENARIOS = {
    "nominal": ({}, {}),
    "sphere only": ({"cone_half_angle_deg": None}, {"cone_half_angle_deg": 15.0}),
    "Hudlet apex and cone": ({"apex": "hudlet"}, {}),
    "gap offset not given": ({"gap_offset_m": 5e-9}, {"gap_offset_m": None}),
    "amplitude not given": ({"amplitude_m": 20e-9}, {"amplitude_m": None, "gap_offset_m": None}),
    "radius 45 nm said 30": ({"tip_radius_m": 45e-9}, {"tip_radius_m": 30e-9}),
}


def _case(name, n, seed):
    made, told = SCENARIOS[name]
    s = build_series(rows=n, cols=n, heights_m=HEIGHTS, noise_deg=0.02, magnetic_scale=0.3, margin_px=64, seed=seed,
                     **made)
    return s, analyse_series(s.phase_deg, heights_m=HEIGHTS, pixel_m=s.pixel_m, **{**s.analysis_kwargs, **told})


def _z(a, s):
    d = a.to_dict()
    out = []
    for part, truth in (("electrostatic_mean", s.electrostatic_deg), ("short_range_mean", s.short_range_deg)):
        whole = np.hypot(d[part + "_std_deg"], d[part + "_model_std_deg"])
        out.append((np.asarray(d[part + "_deg"]) - truth) / whole)
    return np.abs(out).max()


def _honest(a, s):
    return (not a.separable) or _z(a, s) <= 3.0


@pytest.mark.parametrize("name", list(SCENARIOS))
def test_parts_are_within_their_uncertainty_or_not_separable(name):
    s, a = _case(name, 128, 1)
    assert _honest(a, s), (name, _z(a, s), a.separability_sentence)
    # the non-magnetic total is the measured mean, and the parts add up to it
    np.testing.assert_allclose(a.nonmagnetic_mean_deg, a.mean_phase_deg, rtol=1e-12)
    np.testing.assert_allclose(a.electrostatic_mean_deg + a.short_range_mean_deg, a.nonmagnetic_mean_deg, rtol=2e-3)
    # its noise error is that of a mean of white noise over the pixels
    np.testing.assert_allclose(a.nonmagnetic_mean_std_deg, 0.02 / 128, rtol=0.1)


@pytest.mark.slow
def test_parts_are_honest_over_patterns_and_scan_sizes():
    # measured: 62 of 72 cases separable, none beyond 2.86 uncertainties (6 models x 4 patterns x 64, 128, 256 px)
    bad = []
    for n in (64, 128, 256):
        for seed in (1, 2, 3, 4):
            for name in SCENARIOS:
                s, a = _case(name, n, seed)
                if not _honest(a, s):
                    bad.append((name, n, seed, round(_z(a, s), 2)))
    assert not bad, bad


def test_a_model_that_cannot_fit_is_never_silent():
    # a phase reference that wanders from pass to pass (0.05 deg per image, far above the 0.0003 deg the means
    # are measured to): no tip model fits the means
    s = build_series(rows=64, cols=64, heights_m=np.array([20, 30, 45, 60, 80]) * 1e-9, noise_deg=0.02, seed=14)
    phase = s.phase_deg + np.random.default_rng(14).normal(scale=0.05, size=(5, 1, 1))
    a = analyse_series(phase, heights_m=s.heights_m, pixel_m=s.pixel_m, **s.analysis_kwargs)
    assert "does not fit the measured means within their uncertainty" in a.separability_sentence
    assert "Birge ratio" in a.separability_sentence
    d = a.to_dict()
    assert d["mean_model_reduced_chi2"] > 10 and d["mean_model_birge_ratio"] > 3
    # the widening shows in the model uncertainty
    assert np.all(np.asarray(d["electrostatic_mean_model_std_deg"]) > np.asarray(d["electrostatic_mean_std_deg"]))


def test_an_unstated_amplitude_is_said_and_its_range_shown():
    s, a = _case("amplitude not given", 128, 1)
    assert "oscillation amplitude was not given: 10 nm was assumed" in a.separability_sentence
    assert "gap offset was not given" in a.separability_sentence
    d = a.to_dict()
    assert d["assumed"]["amplitude_nm"] == pytest.approx(10.0)
    rng = d["split_vs_amplitude"]
    assert rng["amplitude_nm"] == pytest.approx([5.0, 20.0])
    lo, hi = rng["electrostatic_mean_deg"][0][0], rng["electrostatic_mean_deg"][1][0]
    assert lo != pytest.approx(hi, rel=1e-3)  # the split moves with the amplitude, and the output shows by how much
    assert f"{lo:.3g}" in a.separability_sentence and f"{hi:.3g}" in a.separability_sentence
    # every tip model is listed with its fit and weight; the weights add up to one
    assert sum(m["weight"] for m in d["tip_models"]) == pytest.approx(1.0)


def test_stated_amplitude_and_offset_are_not_varied():
    s, a = _case("nominal", 64, 1)
    d = a.to_dict()
    assert d["assumed"] == {} and d["split_vs_amplitude"] is None
    assert {m["amplitude_nm"] for m in d["tip_models"]} == {10.0}
    assert "was not given" not in a.separability_sentence


# means of a simulated-stage series at 10-100 nm lift, amplitude 19.65 nm, first-pass offset not stored [N/m]
STAGE_HEIGHTS = np.array([10, 15, 20, 30, 50, 75, 100]) * 1e-9
STAGE_MEANS = np.array([7.168, 2.894, 1.703, 0.8461, 0.3531, 0.1746, 0.1176]) * 1e-4


def test_an_unstated_offset_near_the_surface_never_gives_a_repulsive_part():
    # both parts attract (Hudlet et al. 1998, Eur. Phys. J. B 2, 5; Hamaker 1937, Physica 4, 1058). Before: the
    # offset of half the amplitude (tip 0.18 nm above the surface) won the weight and the free fit split the
    # 7.2e-4 N/m at 10 nm into 2.9e-3 and -2.2e-3 N/m, still called separable; the stage's own parts were
    # 4.1e-4 and 3.1e-4 N/m (after: 3.7e-4 and 3.5e-4)
    from assistant.analysis.lift_series.mean_parts import split_heights_only
    from assistant.analysis.lift_series.tip_candidates import MIN_CLOSEST_APPROACH_M

    m = split_heights_only(STAGE_MEANS, np.full(7, 3e-7), np.zeros((7, 7)), heights_m=STAGE_HEIGHTS,
                           tip_radius_m=30e-9, cone_half_angle_deg=15.0, cone_height_m=10e-6, amplitude_m=19.65e-9,
                           gap_offset_m=None)
    assert m.electrostatic[0] >= 0 and m.short_range[0] >= 0, m.sentence
    whole = [np.hypot(m.electrostatic_std, m.electrostatic_model_std)[0],
             np.hypot(m.short_range_std, m.short_range_model_std)[0]]
    assert (not m.separable) or (m.electrostatic[0] > 2 * whole[0] and m.short_range[0] > 2 * whole[1])
    assert min(c.closest_approach_m(STAGE_HEIGHTS[0]) for c in m.candidates) >= MIN_CLOSEST_APPROACH_M
    # the stated offset is the one the weighted models carry, not "closest approach = lift height"
    gap = sum(c.weight * c.gap_offset_m for c in m.candidates)
    assert m.assumed["gap_offset"].startswith(f"{gap * 1e9:.3g} nm") and "= lift height" not in m.sentence


def test_an_unstated_offset_near_the_surface_is_honest_on_a_synthetic_series():
    # tip 4.2 nm above the surface at the lowest of 10 nm (offset 13.8 nm, amplitude 20 nm); before: the offset
    # of half the amplitude won and the electrostatic part came out +7.0 deg (attractive is negative) against
    # -1.8 deg made
    heights = STAGE_HEIGHTS
    s = build_series(rows=64, cols=64, heights_m=heights, noise_deg=0.02, magnetic_scale=0.3, margin_px=32,
                     amplitude_m=20e-9, gap_offset_m=13.8e-9, seed=1)
    a = analyse_series(s.phase_deg, heights_m=heights, pixel_m=s.pixel_m, **{**s.analysis_kwargs, "gap_offset_m": None})
    assert a.electrostatic_mean_deg[0] <= 0 and a.short_range_mean_deg[0] <= 0, a.separability_sentence
    assert _honest(a, s), (_z(a, s), a.separability_sentence)


@pytest.mark.parametrize("off_m", [-0.5e-9, 0.5e-9])
def test_a_stated_offset_off_by_its_uncertainty_is_honest(off_m):
    # a session's offset comes from the setpoint rule (amplitude x setpoint ratio: 0.7 x 20 nm = 14 nm), which is
    # good to FIRST_PASS_GAP_OFFSET_STD_M (0.5 nm); the series is made one such uncertainty either side, with the
    # published physics of synthetic_series.py. Measured on 64 x 64 (seed 1): the parts 1.5 (-0.5 nm) and 0.8
    # (+0.5 nm) whole uncertainties from the truth; with the offset taken as exact, 3.1 and 4.4, still separable
    from assistant.analysis.lift_series import FIRST_PASS_GAP_OFFSET_STD_M

    s = build_series(rows=64, cols=64, heights_m=STAGE_HEIGHTS, noise_deg=0.02, magnetic_scale=0.3, margin_px=32,
                     amplitude_m=20e-9, gap_offset_m=14e-9 + off_m, seed=1)

    def told(std):
        return analyse_series(s.phase_deg, heights_m=STAGE_HEIGHTS, pixel_m=s.pixel_m,
                              **{**s.analysis_kwargs, "gap_offset_m": 14e-9, "gap_offset_std_m": std})

    a = told(FIRST_PASS_GAP_OFFSET_STD_M)
    assert _honest(a, s), (_z(a, s), a.separability_sentence)
    assert "gap offset 14 ± 0.5 nm" in a.separability_sentence
    assert sorted({round(m["gap_offset_nm"], 6) for m in a.to_dict()["tip_models"]}) == pytest.approx(
        [14 - 0.5 * 1.5**0.5, 14, 14 + 0.5 * 1.5**0.5])
    if off_m > 0:  # the check can fail: taken as exact, the offset's error is missing from the uncertainty
        exact = told(None)
        assert exact.separable and _z(exact, s) > 3.0, _z(exact, s)
