"""Alignment by a band-limited shift of the reflected scan, and the drift refined with the fit.

* Shift theorem (Bracewell 2000, The Fourier Transform and its Applications, 3rd ed.; from memory): a
  band-limited shift of a cosine displaces it exactly; whole pixels reproduce ``np.roll`` away from the edges.
* A unitary shift keeps white noise white: the variance of shifted white noise stays that of the input
  (where a bilinear interpolation at half a pixel would halve it, 2 x (1/2)^2 per axis).
* Drift: synthetic non-periodic series built from the published physics (tests/analysis/synthetic_series.py).
"""

import numpy as np

from assistant.analysis.lift_series.reflected_drift import fit_with_drift_reflected, reflect_align
from tests.analysis.lift_series.synthetic_series import build_series


def test_whole_pixel_shift_is_a_roll_away_from_the_edges():
    rng = np.random.default_rng(0)
    x = rng.standard_normal((2, 48, 40))
    out, ok = reflect_align(x, np.ones(x.shape, bool), np.array([[2.0, -3.0], [0.0, 1.0]]))
    # aligned(r, c) = moving(r + drow, c + dcol)
    np.testing.assert_allclose(out[0, 4:-4, 4:-4], np.roll(x[0], (-2, 3), axis=(0, 1))[4:-4, 4:-4], atol=1e-12)
    np.testing.assert_allclose(out[1, 4:-4, 4:-4], np.roll(x[1], (0, -1), axis=(0, 1))[4:-4, 4:-4], atol=1e-12)
    assert ok.all()


def test_sub_pixel_shift_of_a_smooth_field():
    r = np.arange(64)[:, None]
    c = np.arange(64)[None, :]
    f = lambda rr, cc: np.cos(2 * np.pi * rr / 23.0) * np.sin(2 * np.pi * cc / 17.0 + 0.3)  # noqa: E731
    moving = f(r - 0.37, c + 0.81)[None]  # content displaced by (0.37, -0.81)
    out, _ = reflect_align(moving, np.ones(moving.shape, bool), np.array([[0.37, -0.81]]))
    # exact in the interior up to the reflection's reach (the field is not even about the edges)
    assert np.abs(out[0, 12:-12, 12:-12] - f(r, c)[12:-12, 12:-12]).max() < 2e-3


def test_white_noise_stays_white():
    rng = np.random.default_rng(1)
    x = rng.standard_normal((4, 128, 128))
    out, _ = reflect_align(x, np.ones(x.shape, bool), np.full((4, 2), 0.5))
    assert abs(out[:, 10:-10, 10:-10].var() - 1.0) < 0.03


def test_holes_stay_missing_and_do_not_spread():
    rng = np.random.default_rng(2)
    x = rng.standard_normal((1, 64, 64)) * 0.01 + np.cos(np.arange(64) / 6.0)[None, None, :]
    ok = np.ones(x.shape, bool)
    ok[0, 30:34, 30:34] = False
    x[~ok] = 1e3  # garbage where the data are missing
    out, ok_out = reflect_align(x, ok, np.array([[0.4, -0.3]]))
    assert not ok_out[0, 31:33, 31:33].any()
    assert ok_out.sum() >= ok.sum() - 40
    assert np.abs(out[0][ok_out[0]]).max() < 2.0  # the garbage did not reach the valid pixels


def test_drift_refined_with_the_fit_on_a_non_periodic_crop():
    heights = np.array([20, 30, 40, 55, 70, 90]) * 1e-9
    drift = np.c_[np.linspace(0, 1.8, 6), np.linspace(0, -1.2, 6)]
    s = build_series(rows=96, cols=96, heights_m=heights, noise_deg=0.03, magnetic_scale=0.3, drift_px=drift,
                     margin_px=48, seed=31)
    k, qf = s.analysis_kwargs["spring_constant_n_per_m"], s.analysis_kwargs["quality_factor"]
    grad = -np.tan(np.radians(s.phase_deg)) * k / qf  # phase = -arctan(Q F'/k) (driven oscillator)
    grad = grad - grad.mean(axis=(1, 2), keepdims=True)
    start = np.zeros_like(drift)
    start[1:] = np.round(drift[1:])  # a coarse start, as an integer-pixel correlation peak gives
    fit, est, _, _ = fit_with_drift_reflected(grad, np.ones(grad.shape, bool), start, heights_m=heights,
                                            pixel_m=s.pixel_m, interior_px=11)
    assert np.abs(est - drift).max() < 0.1, est - drift
    assert fit.model.shape == grad.shape
