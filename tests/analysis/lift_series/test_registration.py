"""Sub-pixel registration by phase correlation (Guizar-Sicairos, Thurman & Fienup 2008, Opt. Lett. 33, 156)
against shifts made with the Fourier shift theorem (independent implementation in the synthetic builder)."""

import numpy as np
import pytest

from assistant.analysis.lift_series.registration import align_stack, estimate_drift_px, estimate_shift_px, fourier_shift
from tests.analysis.lift_series.synthetic_series import random_domains, shift_image


def _pattern(rng, n=128, blur_px=1.5):
    img = random_domains(n, n, 1.0, 20.0, rng)
    q = 2 * np.pi * np.hypot(np.fft.fftfreq(n)[:, None], np.fft.fftfreq(n)[None, :])
    return np.fft.ifft2(np.fft.fft2(img) * np.exp(-q * blur_px)).real


@pytest.mark.parametrize("shift", [(0.0, 0.0), (1.37, -2.61), (-4.5, 0.25), (7.0, -3.0), (0.49, 0.51)])
def test_known_subpixel_shift_noise_free(shift):
    rng = np.random.default_rng(1)
    ref = _pattern(rng)
    mov = shift_image(ref, *shift)
    est = estimate_shift_px(ref, mov)
    np.testing.assert_allclose(est, shift, atol=0.011)  # 1/100 px grid


def test_shift_between_differently_blurred_noisy_images():
    # a higher lift height: the same pattern low-passed by exp(-|q| dh), plus noise as strong as its contrast
    rng = np.random.default_rng(2)
    ref = _pattern(rng, n=256)
    q = 2 * np.pi * np.hypot(np.fft.fftfreq(256)[:, None], np.fft.fftfreq(256)[None, :])
    errs = []
    for _ in range(4):
        d = rng.uniform(-3, 3, 2)
        top = np.fft.ifft2(np.fft.fft2(ref) * np.exp(-q * 6.0)).real
        s = top.std()
        a = ref + rng.normal(scale=s, size=ref.shape)
        b = shift_image(top, *d) + rng.normal(scale=s, size=ref.shape)
        errs.append(estimate_shift_px(a, b) - d)
    err = np.abs(errs).max()
    assert err < 0.3, err


def test_integer_roll_is_exact():
    rng = np.random.default_rng(3)
    ref = _pattern(rng) + rng.normal(scale=0.1, size=(128, 128))
    mov = shift_image(ref, 0.3, -0.8)
    base = estimate_shift_px(ref, mov)
    rolled = estimate_shift_px(ref, np.roll(mov, (5, -7), axis=(0, 1)))
    np.testing.assert_allclose(rolled - base, [5, -7], atol=1e-9)


def test_fourier_shift_reproduces_roll_and_align_undoes_drift():
    rng = np.random.default_rng(4)
    img = rng.normal(size=(64, 96))
    np.testing.assert_allclose(fourier_shift(img, [3, -5]), np.roll(img, (3, -5), axis=(0, 1)), atol=1e-10)
    smooth = _pattern(rng, n=64)
    f = np.fft.fft2(smooth)
    f[32, :] = 0.0  # a sub-pixel shift cannot be undone at the Nyquist frequency: test a band-limited image
    f[:, 32] = 0.0
    smooth = np.fft.ifft2(f).real
    drift = np.array([[0, 0], [1.25, -0.5], [-2.0, 3.3]])
    stack = np.array([shift_image(smooth, *d) for d in drift])
    est = estimate_drift_px(stack)
    np.testing.assert_allclose(est, drift, atol=0.011)
    back = align_stack(stack, drift)
    np.testing.assert_allclose(back, np.repeat(smooth[None], 3, axis=0), atol=1e-9)


def test_nan_pixels_tolerated():
    rng = np.random.default_rng(6)
    ref = _pattern(rng)
    mov = shift_image(ref, -1.6, 2.2)
    mov[rng.random(mov.shape) < 0.02] = np.nan
    np.testing.assert_allclose(estimate_shift_px(ref, mov), [-1.6, 2.2], atol=0.05)


def test_shape_mismatch_rejected():
    with pytest.raises(ValueError, match="shapes"):
        estimate_shift_px(np.zeros((8, 8)), np.zeros((8, 9)))
