"""The preview colour scale: the report's phase map, diverging about zero, dark = negative, monotone in
lightness."""

import numpy as np

from assistant.report.colours import phase_rgb
from assistant.tui.colours import LEVELS, diverging_scale, quantise_symmetric, symmetric_limit
from assistant.tui.widgets import resample_nearest


def _relative_luminance(rgb255):
    # WCAG 2.x relative luminance of sRGB colours (W3C, Web Content Accessibility Guidelines 2.1, 2018).
    c = np.asarray(rgb255, dtype=float) / 255
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return lin @ np.array([0.2126, 0.7152, 0.0722])


def test_the_previews_use_the_reports_phase_map():
    np.testing.assert_array_equal(diverging_scale(17), np.round(phase_rgb(17) * 255).astype(int))


def test_scale_is_dark_for_negative_and_monotone():
    rgb = diverging_scale()
    lum = _relative_luminance(rgb)
    assert np.all(np.diff(lum) > 0)  # lightness alone orders the values
    assert lum[0] < 0.05 and lum[-1] > 0.7
    centre = rgb[LEVELS // 2]
    assert np.ptp(centre) <= 12  # near-neutral grey at zero
    assert rgb[0][2] > rgb[0][0] and rgb[-1][0] > rgb[-1][2]  # blue side negative, amber side positive


def test_quantise_is_symmetric_about_zero_and_marks_nan():
    idx = quantise_symmetric(np.array([-2.0, -1.0, 0.0, 1.0, 2.0, np.nan]), 1.0, levels=65)
    assert idx.tolist() == [0, 0, 32, 64, 64, -1]
    assert symmetric_limit(np.array([np.nan, np.nan])) == 1.0
    assert symmetric_limit(np.array([-3.0, 1.0, np.nan]), percentile=100) == 3.0


def test_resample_keeps_corners():
    img = np.arange(12.0).reshape(3, 4)
    out = resample_nearest(img, 6, 8)
    assert out.shape == (6, 8) and out[0, 0] == 0 and out[-1, -1] == 11
