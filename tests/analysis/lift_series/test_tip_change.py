"""Tip-induced irreversible change: a repeated first-height pass after the tip switched a disk of domains
(synthetic film and tip as in synthetic_series.py). Thresholds are common practice, no source."""

import numpy as np
import pytest
from scipy import ndimage

from assistant.analysis.lift_series.decomposition import analyse_series
from assistant.analysis.lift_series.tip_change import detect_tip_change
from tests.analysis.lift_series.synthetic_series import build_series

HEIGHTS = np.array([20, 30, 40, 60, 80]) * 1e-9


def test_flipped_disk_is_found_and_nothing_else():
    s = build_series(rows=128, cols=128, heights_m=HEIGHTS, noise_deg=0.05, magnetic_scale=0.3, repeat=True,
                     flip_disk=(40, 70, 12), seed=31)
    a = analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m, repeat_phase_deg=s.repeat_phase_deg,
                       **s.analysis_kwargs)
    t = a.tip_change
    assert t.irreversible and a.to_dict()["tip_changed_sample"] is True
    truth = s.changed_map  # where the clean images differ by more than 5 noise std
    # every flagged pixel is a real change: the true change averaged over the 3 x 3 smoothing box exceeds
    # the noise std of that average (0.05 / 3 deg); smoothing finds extended changes below 5 std per pixel
    true_sm = ndimage.uniform_filter(s.extras["clean_change_deg"], size=3, mode="wrap")
    assert np.all(np.abs(true_sm[t.changed]) > 0.05 / 3)
    assert not np.any(t.changed & ~ndimage.binary_dilation(truth, iterations=5))
    found = (t.changed & truth).sum() / truth.sum()
    assert found > 0.9, found
    assert t.noise_deg == pytest.approx(0.05, rel=0.1)
    assert "changed the sample" in t.sentence


def test_unchanged_repeat_flags_nothing():
    s = build_series(rows=128, cols=128, heights_m=HEIGHTS, noise_deg=0.05, magnetic_scale=0.3, repeat=True, seed=32)
    t = detect_tip_change(s.phase_deg[0], s.repeat_phase_deg)
    assert not t.irreversible and t.changed_fraction == 0.0
    assert t.noise_deg == pytest.approx(0.05, rel=0.1)


def test_uniform_offset_is_not_a_change():
    rng = np.random.default_rng(33)
    a = ndimage.gaussian_filter(rng.normal(size=(64, 64)), 3)
    b = a + 0.3 + rng.normal(scale=0.01, size=a.shape)
    t = detect_tip_change(a, b)
    assert not t.irreversible and t.offset_deg == pytest.approx(0.3, abs=0.005)


def test_shape_mismatch():
    with pytest.raises(ValueError, match="shape"):
        detect_tip_change(np.zeros((8, 8)), np.zeros((8, 9)))


def test_change_over_most_of_the_scan_is_found():
    # a tip that rewrites most of a soft film: the spread of the difference is then the change itself, and
    # a noise taken from it (median absolute deviation) hides the change; the analysis judges the
    # difference against the top image's own noise instead
    s = build_series(rows=128, cols=128, heights_m=HEIGHTS, noise_deg=0.05, magnetic_scale=0.3, repeat=True,
                     flip_disk=(64, 64, 56), seed=34)
    assert s.changed_map.mean() > 0.5  # the scenario: more than half of the pixels really changed
    blind = detect_tip_change(s.phase_deg[0], s.repeat_phase_deg)
    assert blind.noise_deg > 3 * 0.05  # the self-referenced noise is inflated by the change
    assert not blind.irreversible  # ... and the change goes unseen (the defect this guards against)
    a = analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m, repeat_phase_deg=s.repeat_phase_deg,
                       **s.analysis_kwargs)
    t = a.tip_change
    assert t.irreversible and a.to_dict()["tip_changed_sample"] is True
    found = (t.changed & s.changed_map).sum() / s.changed_map.sum()
    assert found > 0.5, found
    true_sm = ndimage.uniform_filter(s.extras["clean_change_deg"], size=3, mode="wrap")
    assert np.all(np.abs(true_sm[t.changed]) > 0.05 / 3)
    # the reference noise then comes from the top image, not from the changed repeat
    assert a.reference_noise_deg == pytest.approx(0.05, rel=0.15)


def test_pixels_where_the_tip_touches_are_not_judged():
    # where the tip touches (tall features under a low lift) the phase swings by tens of degrees a pixel and past
    # 45 deg; a small shift between the passes there is no rewritten sample. Such pixels are left out, as the
    # decomposition leaves them out of its fit
    rng = np.random.default_rng(35)
    first = ndimage.gaussian_filter(rng.normal(size=(64, 64)), 3) + rng.normal(scale=0.05, size=(64, 64))
    repeat = first + rng.normal(scale=0.05, size=first.shape)
    rr, cc = np.mgrid[0:64, 0:64]
    rim = np.abs(np.hypot(rr - 32, cc - 32) - 10) < 1.0  # a ring of touching pixels round a tall feature
    first[rim], repeat[rim] = 80.0, 60.0
    t = detect_tip_change(first, repeat, noise_deg=0.05)
    assert not t.irreversible and np.isnan(t.difference_deg[rim]).all()
    assert detect_tip_change(first, repeat, noise_deg=0.05, max_phase_deg=np.inf).irreversible
