"""The reflected-edge continuation fit against fields built here from the published physics.

* Above the film every harmonic field component decays as exp(-|q| dz) (Laplace's equation; Hug et al. 1998,
  J. Appl. Phys. 83, 5609; Wallace 1951, Bell Syst. Tech. J. 30, 1145). A field that is a finite sum of
  cosines even about the scan's edges, ``cos(pi k (i + 1/2) / N)``, is represented exactly by the reflected
  scan, so the fit must reproduce it to rounding; the cosines are written out here with numpy, not taken from
  the code's transform.
* White noise: the method-of-moments estimate of each height's noise and the expected residual must match
  the noise put in (Parseval for the orthonormal DCT; scipy.fft documents ``norm="ortho"`` as orthonormal).
"""

import numpy as np
import pytest

from assistant.analysis.lift_series.reflected import fit_continuation_reflected
from assistant.analysis.lift_series.continuation import resolution_period_m

HEIGHTS = np.array([20, 30, 45, 60, 80]) * 1e-9
PIXEL = 10e-9


def _even_cosine_stack(rows, cols, heights, terms, pixel=PIXEL):
    """Sum of cosines even about the scan edges, each continued by exp(-|q| (h - h_0))."""
    i = (np.arange(rows) + 0.5)[:, None]
    j = (np.arange(cols) + 0.5)[None, :]
    out = np.zeros((len(heights), rows, cols))
    for k, m, a in terms:
        q = np.pi * np.hypot(k / (rows * pixel), m / (cols * pixel))
        shape = np.cos(np.pi * k * i / rows) * np.cos(np.pi * m * j / cols)
        out += a * np.exp(-q * (heights - heights[0]))[:, None, None] * shape[None]
    return out


TERMS = [(3, 0, 1.0), (0, 5, -0.7), (4, 7, 0.5), (11, 2, 0.3), (20, 17, 0.2)]


def test_even_field_is_reproduced_exactly():
    stack = _even_cosine_stack(96, 80, HEIGHTS, TERMS)
    fit = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL)
    truth = stack - stack.mean(axis=(1, 2), keepdims=True)
    # single-precision transforms: rounding about 1e-7 of the contrast
    assert np.abs(fit.model - truth).max() < 1e-5 * np.abs(truth).max()
    assert fit.grid == "dct"


def test_white_noise_sigma_and_expected_residual():
    rng = np.random.default_rng(3)
    sig = np.array([0.02, 0.02, 0.03, 0.02, 0.025])
    clean = _even_cosine_stack(128, 128, HEIGHTS, TERMS)
    stack = clean + sig[:, None, None] * rng.standard_normal(clean.shape)
    fit = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL, interior_px=10)
    # the moment estimate is unbiased (mean over 12 seeds 1.017 +- 0.021 of the truth at the lowest height);
    # its scatter is 0.6 % above the lowest height and 7 % at it, whose residual keeps few degrees of freedom
    # (the height alone measures its finest detail)
    np.testing.assert_allclose(fit.noise_std[1:], sig[1:], rtol=0.03)
    assert abs(fit.noise_std[0] / sig[0] - 1) < 0.25
    np.testing.assert_allclose(fit.residual_rms, fit.expected_residual_rms, rtol=0.04)
    # the lowest height measures its finest detail alone: a small residual, well below the noise
    assert fit.expected_residual_rms[0] < 0.5 * sig[0]
    # magnetic rms over the interior (about its mean), debiased by the fit noise, within three standard
    # errors
    centred = clean - clean.mean(axis=(1, 2), keepdims=True)
    true_rms = np.std(centred[:, 10:-10, 10:-10], axis=(1, 2))
    assert np.all(np.abs(fit.magnetic_rms - true_rms) < 3 * fit.magnetic_rms_std + 1e-4), (fit.magnetic_rms, true_rms)


def test_noise_weights_change_nothing_for_equal_noise():
    rng = np.random.default_rng(4)
    clean = _even_cosine_stack(64, 64, HEIGHTS, TERMS)
    stack = clean + 0.02 * rng.standard_normal(clean.shape)
    a = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL)
    b = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL, noise_std=a.noise_std)
    np.testing.assert_allclose(a.magnetic_rms, b.magnetic_rms, rtol=2e-3)
    with pytest.raises(ValueError, match="noise_std"):
        fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL, noise_std=[0.02, 0.02])


def test_a_height_with_extra_noise_weighs_less():
    rng = np.random.default_rng(5)
    clean = _even_cosine_stack(64, 64, HEIGHTS, TERMS)
    sig = np.array([0.02, 0.2, 0.02, 0.02, 0.02])
    stack = clean + sig[:, None, None] * rng.standard_normal(clean.shape)
    # as the drift rounds of analyse_series do: equal weights, then each fit weighted by the one before
    equal = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL)
    once = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL, noise_std=equal.noise_std)
    twice = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL, noise_std=once.noise_std)
    truth = clean - clean.mean(axis=(1, 2), keepdims=True)
    err = [np.sqrt(np.mean((f.model - truth) ** 2)) for f in (equal, once, twice)]
    assert err[2] < 0.6 * err[0], err
    # with equal weights the lowest height's residual is mostly the noisy height's noise continued down, so
    # its first estimate is far too high (0.17 for 0.02 here); once that height weighs less, it is right
    np.testing.assert_allclose(equal.noise_std[1:], sig[1:], rtol=0.1)
    np.testing.assert_allclose(once.noise_std, sig, rtol=0.2)
    np.testing.assert_allclose(twice.noise_std, sig, rtol=0.1)


def test_masked_pixels_are_filled_and_reported_missing():
    rng = np.random.default_rng(6)
    clean = _even_cosine_stack(64, 64, HEIGHTS, TERMS)
    stack = clean + 0.01 * rng.standard_normal(clean.shape)
    stack[2, 10:14, 20:30] = np.nan
    fit = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=PIXEL)
    assert np.isnan(fit.residual[2, 10:14, 20:30]).all()
    assert np.isfinite(fit.model).all()
    truth = clean - clean.mean(axis=(1, 2), keepdims=True)
    # the hole is predicted from the other heights: within a few noise standard deviations
    assert np.abs(fit.model[2, 10:14, 20:30] - truth[2, 10:14, 20:30]).max() < 0.05


def test_resolution_coarsens_with_height_on_the_cosine_grid():
    rng = np.random.default_rng(7)
    terms = [(k, k // 2, 1.0 / (1 + k)) for k in range(1, 60, 3)]
    clean = _even_cosine_stack(128, 128, HEIGHTS, terms)
    fit = fit_continuation_reflected(clean + 0.01 * rng.standard_normal(clean.shape), heights_m=HEIGHTS,
                                   pixel_m=PIXEL)
    per = resolution_period_m(fit)
    assert np.all(np.isfinite(per))
    assert np.all(np.diff(per) >= 0), per
