"""Recommended lift height and bias on synthetic series (physics as in synthetic_series.py). The rule itself
(short-range at most 10 % of the magnetic rms, residual at noise) is common practice, no source."""

import numpy as np
import pytest

from assistant.analysis.lift_series.recommend import recommend_lift
from assistant.analysis.lift_series.decomposition import analyse_series
from tests.analysis.lift_series.synthetic_series import build_series

HEIGHTS = np.array([6, 9, 12, 16, 20, 26, 34, 44]) * 1e-9


def _series(**kw):
    base = dict(rows=128, cols=128, heights_m=HEIGHTS, noise_deg=0.03, magnetic_scale=0.45, hamaker_j=3e-19, seed=21)
    return build_series(**{**base, **kw})


def _expected_index(s, fraction):
    ratio = np.abs(s.short_range_deg) / s.magnetic_rms_deg
    i = int(np.argmax(ratio <= fraction))
    # the scenario must not sit on the threshold, or the test would measure noise
    assert ratio[i] < 0.9 * fraction and ratio[i - 1] > 1.1 * fraction
    return i


def test_lowest_height_meeting_the_short_range_limit():
    s = _series()
    a = analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m, **s.analysis_kwargs)
    i = _expected_index(s, 0.1)
    assert a.recommendation.lift_height_m == pytest.approx(HEIGHTS[i])
    assert a.to_dict()["recommended_lift_nm"] == pytest.approx(HEIGHTS[i] * 1e9)
    assert f"{HEIGHTS[i] * 1e9:.4g} nm" in a.recommendation.sentence


def test_threshold_is_a_keyword():
    s = _series()
    a = analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m, short_range_fraction=0.3,
                       **s.analysis_kwargs)
    i = _expected_index(s, 0.3)
    assert a.recommendation.lift_height_m == pytest.approx(HEIGHTS[i])


def test_height_with_non_laplace_residual_is_skipped():
    # contrast that does not continue as exp(-|q| h) (e.g. topographic cross-talk) at the lowest height only
    s = _series()
    phase = s.phase_deg.copy()
    phase[0] += 0.15 * np.sign(np.sin(np.arange(128) / 5.0))[None, :]
    # the series is one period of the film, so the periodic estimator fits it exactly and the rule alone is seen
    a = analyse_series(phase, heights_m=s.heights_m, pixel_m=s.pixel_m, short_range_fraction=0.9,
                       edge="periodic", **s.analysis_kwargs)
    assert not a.residual_at_noise[0]
    assert np.all(a.residual_at_noise[1:])
    ratio = np.abs(s.short_range_deg) / s.magnetic_rms_deg
    assert ratio[0] < 0.9  # the lowest height would qualify on the short-range rule alone
    assert a.recommendation.lift_height_m == pytest.approx(HEIGHTS[1])
    # the default (reflected-edge) fit skips the lowest height too. Its weights follow the series' one noise level,
    # not the residual (which made them jump with the noise draw), so part of the cross-talk leaks into the next
    # heights (residual 1.61, 1.39, 1.27 x noise there) and the advice moves up to 20 nm
    d = analyse_series(phase, heights_m=s.heights_m, pixel_m=s.pixel_m, short_range_fraction=0.9,
                       **s.analysis_kwargs)
    assert not d.residual_at_noise[0]
    assert d.recommendation.lift_height_m > HEIGHTS[0]


def test_bias_recommendation_is_vcpd_with_a_grid():
    s = _series(bias_v=np.array([-0.5, 0.0, 0.5, 1.0]), cpd_v=0.2, heights_m=HEIGHTS[:5])
    a = analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m, bias_v=s.bias_v, **s.analysis_kwargs)
    assert a.recommendation.bias_v == pytest.approx(0.2, abs=0.02)
    assert "V_cpd" in a.recommendation.sentence


def test_no_height_qualifies():
    r = recommend_lift(heights_m=[10e-9, 20e-9, 30e-9], magnetic_rms=[1.0, 0.8, 0.5], magnetic_rms_std=[0.01] * 3,
                       short_range=[0.5, 0.3, 0.2], residual_ok=[True] * 3, resolution_period_m=[50e-9, 60e-9, 70e-9])
    assert r.lift_height_m is None and "short-range" in r.sentence
    r = recommend_lift(heights_m=[10e-9, 20e-9, 30e-9], magnetic_rms=[1.0, 0.8, 0.5], magnetic_rms_std=[0.01] * 3,
                       short_range=[0.05, 0.03, 0.02], residual_ok=[False, True, True],
                       resolution_period_m=[50e-9, 60e-9, 70e-9])
    assert r.lift_height_m == pytest.approx(20e-9) and "60 nm" in r.sentence
