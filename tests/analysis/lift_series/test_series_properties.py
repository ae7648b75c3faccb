"""Invariants of analyse_series (hypothesis) and its input errors.

The roll and scaling invariants are properties of the periodic estimator (``edge="periodic"``: a scan
that is one period of the field, so a whole-pixel roll is a symmetry and the fit is linear in the data);
they are checked on it. The default (reflected-edge) and the windowed estimators treat the scan as a crop,
for which a roll is not a symmetry; they are checked on non-periodic crops in test_decomposition.py, and the
default one for the scaling invariant below too."""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from assistant.analysis.lift_series import errors as ser
from assistant.analysis.lift_series.decomposition import analyse_series
from tests.analysis.lift_series.synthetic_series import build_series

HEIGHTS = np.array([20, 35, 50, 70]) * 1e-9
BASE = build_series(rows=64, cols=64, heights_m=HEIGHTS, noise_deg=0.03, magnetic_scale=0.3,
                    drift_px=np.array([[0, 0], [0.4, -0.3], [0.9, 0.2], [1.3, -0.6]]), seed=41)
KW = BASE.analysis_kwargs
SCALARS = ("magnetic_rms_deg", "electrostatic_mean_deg", "short_range_mean_deg", "residual_rms_deg",
           "magnetic_rms_std_deg", "short_range_mean_std_deg", "noise_deg", "resolution_period_m")


def _analyse(phase):
    return analyse_series(phase, heights_m=HEIGHTS, pixel_m=BASE.pixel_m, edge="periodic", **KW)


REF = _analyse(BASE.phase_deg)


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.integers(-20, 20), st.integers(-20, 20)), min_size=4, max_size=4))
def test_whole_pixel_roll_changes_only_drift(shifts):
    shifts = np.array(shifts)
    shifts[0] = 0  # the first height is the reference frame
    rolled = np.array([np.roll(img, tuple(sh), axis=(0, 1)) for img, sh in zip(BASE.phase_deg, shifts)])
    a = _analyse(rolled)
    np.testing.assert_allclose(a.drift_px - REF.drift_px, shifts, atol=1e-6)
    for name in SCALARS:
        np.testing.assert_allclose(getattr(a, name), getattr(REF, name), rtol=1e-6, atol=1e-12, err_msg=name)
    np.testing.assert_allclose(a.magnetic_deg, REF.magnetic_deg, atol=1e-6)
    assert a.recommendation.lift_height_m == REF.recommendation.lift_height_m


@settings(max_examples=4, deadline=None)
@given(st.tuples(st.integers(-30, 30), st.integers(-30, 30)))
def test_rolling_the_whole_stack_moves_only_the_maps(shift):
    a = _analyse(np.roll(BASE.phase_deg, shift, axis=(1, 2)))
    np.testing.assert_allclose(a.drift_px, REF.drift_px, atol=1e-6)
    for name in SCALARS:
        np.testing.assert_allclose(getattr(a, name), getattr(REF, name), rtol=1e-6, atol=1e-12, err_msg=name)
    np.testing.assert_allclose(a.magnetic_deg, np.roll(REF.magnetic_deg, shift, axis=(1, 2)), atol=1e-6)


def _compose(scale, rng_seed=0):
    ex = BASE.extras
    k, q = KW["spring_constant_n_per_m"], KW["quality_factor"]
    g = scale * ex["magnetic_gradient"] + ex["es_gradient"][:, 0, None, None] + ex["vdw_gradient"][:, None, None]
    noise = np.random.default_rng(rng_seed).normal(scale=0.01, size=g.shape)
    return -np.degrees(np.arctan(q * g / k)) + noise


@settings(max_examples=6, deadline=None)
@given(st.floats(0.3, 3.0))
def test_scaling_the_magnetic_part_scales_only_magnetic_outputs(scale):
    one = analyse_series(_compose(1.0), heights_m=HEIGHTS, pixel_m=BASE.pixel_m, register=False, edge="periodic",
                         **KW)
    a = analyse_series(_compose(scale), heights_m=HEIGHTS, pixel_m=BASE.pixel_m, register=False, edge="periodic",
                       **KW)
    k, q = KW["spring_constant_n_per_m"], KW["quality_factor"]
    # the magnetic force-gradient map scales while the noise it carries (the same realisation) does not:
    # map(scale) - scale * truth == map(1) - truth, to a fraction of the 0.01 deg noise
    g_true = BASE.extras["magnetic_gradient"]
    g_one = -k / q * np.tan(np.radians(one.magnetic_deg))
    g_a = -k / q * np.tan(np.radians(a.magnetic_deg))
    noise_g = k / q * np.radians(0.01)
    np.testing.assert_allclose(g_a - scale * g_true, g_one - g_true, rtol=0, atol=0.5 * noise_g)
    # the rms phase scales as the arctan of the scaled gradient does (computed from the true gradient)
    rms = [np.sqrt(np.mean(np.degrees(np.arctan(q * f * g_true / k)) ** 2, axis=(1, 2))) for f in (1.0, scale)]
    np.testing.assert_allclose(a.magnetic_rms_deg / one.magnetic_rms_deg, rms[1] / rms[0], rtol=5e-3)
    # the image-mean parts do not move
    np.testing.assert_allclose(a.electrostatic_mean_deg, one.electrostatic_mean_deg, rtol=1e-4)
    np.testing.assert_allclose(a.short_range_mean_deg, one.short_range_mean_deg, rtol=1e-3)
    np.testing.assert_allclose(a.noise_deg, one.noise_deg, rtol=2e-2)


def test_to_dict_keys_and_json():
    import json

    d = REF.to_dict()
    for key in ("heights_nm", "magnetic_rms_deg", "electrostatic_mean_deg", "short_range_mean_deg",
                "residual_rms_deg", "drift_px", "cpd_v", "recommended_lift_nm", "magnetic_rms_std_deg",
                "electrostatic_mean_std_deg", "short_range_mean_std_deg", "cpd_std_v"):
        assert key in d
    assert len(d["drift_px"]) == 4 and len(d["drift_px"][0]) == 2
    assert d["cpd_v"] is None
    json.dumps(d)


def test_input_errors_name_the_problem():
    p = BASE.phase_deg
    with pytest.raises(ser.TooFewHeightsError, match="at least 3"):
        analyse_series(p[:2], heights_m=HEIGHTS[:2], pixel_m=1e-8)
    with pytest.raises(ser.HeightsMismatchError, match="4 heights"):
        analyse_series(p[:3], heights_m=HEIGHTS, pixel_m=1e-8)
    with pytest.raises(ser.HeightsNotIncreasingError, match="increasing"):
        analyse_series(p, heights_m=HEIGHTS[::-1], pixel_m=1e-8)
    with pytest.raises(ser.ImageShapeError, match="different shapes"):
        analyse_series([p[0], p[1], p[2][:-1], p[3]], heights_m=HEIGHTS, pixel_m=1e-8)
    with pytest.raises(ser.TooFewBiasesError, match="at least 3"):
        analyse_series(np.stack([p, p], axis=1), heights_m=HEIGHTS, pixel_m=1e-8, bias_v=[0.0, 1.0])
    with pytest.raises(ser.TooFewBiasesError, match="needs bias_v"):
        analyse_series(np.stack([p, p, p], axis=1), heights_m=HEIGHTS, pixel_m=1e-8)
    bad = p.copy()
    bad[1, :20] = np.nan
    with pytest.raises(ser.TooManyInvalidPixelsError, match="max_nan_fraction"):
        analyse_series(bad, heights_m=HEIGHTS, pixel_m=1e-8)
    for cls in (ser.TooFewHeightsError, ser.TooManyInvalidPixelsError):
        assert issubclass(cls, ValueError) and issubclass(cls, ser.SeriesInputError)
