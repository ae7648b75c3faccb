"""Synthetic reference films and MFM images made from published formulas, for the quantitative-MFM tests.

The film's field is the Fourier-space formula of a perpendicular film (Hug et al. 1998, J. Appl. Phys. 83, 5609;
checked against magpylib in test_reference.py); the tip is the point-probe model, TTF(k) = mu0 (m k^2 - q k)
exp(-k delta) (Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53; Lohau et al. 1999, J. Appl. Phys. 86, 3410; both from
memory), optionally with the finite-amplitude factor exp(-kA) 2 I1(kA)/(kA) (Giessibl 2001, Appl. Phys. Lett. 78,
123, from memory). Patterns live on a grid ``oversample`` times finer than the image, so walls fall inside image
pixels as they do on a real film; the image samples the fine field at its pixel centres.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import i1e

MU_0 = 1.25663706127e-6  # N/A^2, CODATA 2022


def point_probe_ttf(k, *, moment_a_m2, monopole_a_m, offset_m, amplitude_m=0.0):
    """mu0 (m k^2 - q k) exp(-k delta), times exp(-kA) 2 I1(kA)/(kA) for a peak amplitude A [N/A]."""
    k = np.asarray(k, dtype=float)
    out = MU_0 * (moment_a_m2 * k * k - monopole_a_m * k) * np.exp(-k * offset_m)
    if amplitude_m:
        x = np.maximum(k * amplitude_m, 1e-12)
        out = out * 2.0 * i1e(x) / x
    return out


def maze_pattern(n, *, period_px, rng, width=0.15):
    """+-1 labyrinth on an n x n periodic grid: white noise band-passed around the period, then its sign."""
    f = np.hypot(np.fft.fftfreq(n)[:, None], np.fft.fftfreq(n)[None, :])
    f0 = 1.0 / period_px
    spec = np.fft.fft2(rng.standard_normal((n, n))) * np.exp(-0.5 * ((f - f0) / (width * f0)) ** 2)
    u = np.fft.ifft2(spec).real
    return np.where(u >= 0, 1.0, -1.0)


def fine_field(pattern, *, ms, thickness_m, height_m, pixel_m):
    """Hz [A/m] of a +-1 cell map at ``height_m`` (each cell a uniformly magnetised prism; periodic map)."""
    n0, n1 = pattern.shape
    ky = 2 * np.pi * np.fft.fftfreq(n0, d=pixel_m)[:, None]
    kx = 2 * np.pi * np.fft.rfftfreq(n1, d=pixel_m)[None, :]
    k = np.hypot(ky, kx)
    sinc = np.sinc(np.fft.fftfreq(n0)[:, None]) * np.sinc(np.fft.rfftfreq(n1)[None, :])
    factor = 0.5 * ms * (-np.expm1(-k * thickness_m)) * np.exp(-k * height_m) * sinc
    factor[0, 0] = 0.0
    return np.fft.rfft2(pattern) * factor, k


@dataclass
class Synthetic:
    gradient_n_per_m: np.ndarray   # image of F' [N/m] on the coarse grid
    hz_a_per_m: np.ndarray         # the true Hz at the measurement plane, same grid
    pattern: np.ndarray            # the fine pattern's cell averages on the coarse grid
    pixel_m: float
    hz_whole_a_per_m: np.ndarray   # the true Hz of the whole (periodic) film on the coarse grid
    crop_at: tuple[int, int]       # where the image sits in it

    def hz_in_band(self, band_k_per_m, taper) -> np.ndarray:
        """The true Hz with only the spatial frequencies ``taper(k, band)`` passes, filtered over the whole film
        (not over the image window), cut to the image."""
        whole = self.hz_whole_a_per_m - self.hz_whole_a_per_m.mean()
        ny, nx = whole.shape
        k = np.hypot(2 * np.pi * np.fft.fftfreq(ny, d=self.pixel_m)[:, None],
                     2 * np.pi * np.fft.rfftfreq(nx, d=self.pixel_m)[None, :])
        out = np.fft.irfft2(np.fft.rfft2(whole) * taper(k, band_k_per_m), s=whole.shape)
        r0, c0 = self.crop_at
        rows, cols = self.hz_a_per_m.shape
        return out[r0:r0 + rows, c0:c0 + cols]


def make_image(*, n=128, oversample=4, pixel_m=10e-9, period_m=200e-9, ms=6e5, thickness_m=12e-9, height_m=20e-9,
               moment_a_m2=1e-16, monopole_a_m=-3e-9, offset_m=30e-9, amplitude_m=0.0, noise_n_per_m=0.0,
               seed=1, crop=None, tip_sign=1.0):
    """Synthetic MFM image of a maze film. ``crop=(big_n, r0, c0)``: make a big_n x big_n periodic film and
    return the n x n crop at (r0, c0), a non-periodic window onto it."""
    rng = np.random.default_rng(seed)
    big = n if crop is None else crop[0]
    nf = big * oversample
    pf = pixel_m / oversample
    pattern = maze_pattern(nf, period_px=period_m / pf, rng=rng)
    hz_spec, k = fine_field(pattern, ms=ms, thickness_m=thickness_m, height_m=height_m, pixel_m=pf)
    ttf = tip_sign * point_probe_ttf(k, moment_a_m2=moment_a_m2, monopole_a_m=monopole_a_m, offset_m=offset_m,
                                     amplitude_m=amplitude_m)
    # sample at the coarse pixel centres: shift the fine grid by half a fine cell, then every oversample-th cell
    ky = 2 * np.pi * np.fft.fftfreq(nf, d=pf)[:, None]
    kx = 2 * np.pi * np.fft.rfftfreq(nf, d=pf)[None, :]
    shift = np.exp(1j * (ky + kx) * pf / 2.0)
    sl = slice(oversample // 2 - 1, None, oversample) if oversample > 1 else slice(None)
    hz = np.fft.irfft2(hz_spec * (shift if oversample > 1 else 1.0), s=(nf, nf))[sl, sl]
    grad = np.fft.irfft2(hz_spec * ttf * (shift if oversample > 1 else 1.0), s=(nf, nf))[sl, sl]
    cells = pattern.reshape(big, oversample, big, oversample).mean(axis=(1, 3))
    whole, at = hz.copy(), (0, 0)
    if crop is not None:
        at = (crop[1], crop[2])
        r0, c0 = crop[1], crop[2]
        hz, grad, cells = (a[r0:r0 + n, c0:c0 + n] for a in (hz, grad, cells))
    if noise_n_per_m:
        grad = grad + noise_n_per_m * rng.standard_normal(grad.shape)
    return Synthetic(grad, hz, cells, pixel_m, whole, at)
