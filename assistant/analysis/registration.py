"""Sub-pixel registration of the images of a lift-height series.

Convention: ``drift_px = [drow, dcol]`` is how many pixels the image content is displaced relative to the
reference, i.e. ``moving(r, c) = reference(r - drow, c - dcol)``. Images are treated as periodic (FFT).
"""

from __future__ import annotations

import numpy as np

__all__ = ["estimate_shift_px", "estimate_drift_px", "fourier_shift", "align_stack"]


def _upsampled_dft(data: np.ndarray, size: int, factor: int, offset_r: float, offset_c: float) -> np.ndarray:
    """Inverse DFT of ``data`` on a ``size x size`` grid of spacing 1/factor around (offset_r, offset_c).

    Matrix-multiply DFT (Guizar-Sicairos, Thurman & Fienup 2008, Opt. Lett. 33, 156).
    """
    rows, cols = data.shape
    fr = np.fft.ifftshift(np.arange(rows) - rows // 2)
    fc = np.fft.ifftshift(np.arange(cols) - cols // 2)
    sr = np.arange(size) - size // 2
    kr = np.exp(2j * np.pi / (rows * factor) * np.outer(sr * 1.0 + offset_r * factor, fr))
    kc = np.exp(2j * np.pi / (cols * factor) * np.outer(fc, sr * 1.0 + offset_c * factor))
    # einsum rather than BLAS matmul: no thread pool, steadier on a shared two-core machine
    return np.einsum("ij,jk->ik", np.einsum("ij,jk->ik", kr, data), kc)


def _fill_nan(img: np.ndarray) -> np.ndarray:
    img = np.asarray(img, dtype=float)
    bad = ~np.isfinite(img)
    if np.any(bad):
        img = img.copy()
        img[bad] = np.mean(img[~bad]) if np.any(~bad) else 0.0
    return img - img.mean()


def estimate_shift_px(reference: np.ndarray, moving: np.ndarray, *, upsample: int = 100,
                      whitening: float = 0.0) -> np.ndarray:
    """Sub-pixel displacement of ``moving`` relative to ``reference`` by phase correlation.

    The cross-power spectrum ``M conj(R)`` is divided by ``|M conj(R)|**whitening`` (1 = pure phase
    correlation, 0 = plain cross-correlation, the default: it is the matched filter for white noise and
    measured more precise here when the images are noisy and differently blurred); the integer peak is refined on a grid of 1/upsample px by a matrix-multiply DFT
    (Guizar-Sicairos et al. 2008, Opt. Lett. 33, 156). Any real symmetric spectral weight leaves the peak
    at the true shift, so images blurred by different amounts (different lift heights) register without
    bias. NaN pixels are replaced by the image mean.

    Returns
    -------
    ndarray
        ``[drow, dcol]`` [px].
    """
    ref = _fill_nan(reference)
    mov = _fill_nan(moving)
    if ref.shape != mov.shape:
        raise ValueError(f"image shapes differ: {ref.shape} vs {mov.shape}")
    cross = np.fft.fft2(mov) * np.conj(np.fft.fft2(ref))
    mag = np.abs(cross)
    if whitening > 0:
        floor = 1e-12 * mag.max() if mag.max() > 0 else 1.0
        cross = cross / np.maximum(mag, floor) ** whitening
    corr = np.fft.ifft2(cross)
    rows, cols = corr.shape
    peak = np.unravel_index(np.argmax(corr.real), corr.shape)
    shift = np.array([peak[0], peak[1]], dtype=float)
    shift[0] = shift[0] - rows if shift[0] > rows // 2 else shift[0]
    shift[1] = shift[1] - cols if shift[1] > cols // 2 else shift[1]
    if upsample > 1:
        # parabolic vertex of the 3 x 3 neighbourhood, then matrix-DFT refinement on 1/20 px over +-0.35 px
        # and 1/upsample px over +-0.06 px (small grids keep the DFT cheap)
        r0, c0 = peak
        cr = corr.real
        for axis, (a, b, c) in enumerate(((cr[r0 - 1, c0], cr[r0, c0], cr[(r0 + 1) % rows, c0]),
                                          (cr[r0, c0 - 1], cr[r0, c0], cr[r0, (c0 + 1) % cols]))):
            den = a - 2.0 * b + c
            if den < 0:
                shift[axis] += float(np.clip(0.5 * (a - c) / den, -0.5, 0.5))
        for factor, half_px in ((20, 0.35), (int(upsample), 0.06)):
            if factor <= 20 and factor != 20:
                continue
            half = max(int(np.ceil(half_px * factor)), 1)
            up = _upsampled_dft(cross, 2 * half + 1, factor, shift[0], shift[1]).real
            i, j = np.unravel_index(np.argmax(up), up.shape)
            shift = shift + (np.array([i, j], dtype=float) - half) / factor
    return shift


def estimate_drift_px(stack: np.ndarray, *, upsample: int = 100, whitening: float = 0.0) -> np.ndarray:
    """Drift of every image of ``stack`` (n, rows, cols) relative to the first: (n, 2) ``[drow, dcol]``."""
    stack = np.asarray(stack, dtype=float)
    out = np.zeros((stack.shape[0], 2))
    for i in range(1, stack.shape[0]):  # loop over images, not pixels
        out[i] = estimate_shift_px(stack[0], stack[i], upsample=upsample, whitening=whitening)
    return out


def _shift_phase(shape: tuple[int, int], shift_px) -> np.ndarray:
    """rfft2-domain factor that displaces content by shift_px; shift_px (..., 2) broadcasts over images."""
    rows, cols = shape
    d = np.asarray(shift_px, dtype=float)
    dr = d[..., 0, None, None]
    dc = d[..., 1, None, None]
    phr = np.exp(-2j * np.pi * np.fft.fftfreq(rows)[:, None] * dr)
    phc = np.exp(-2j * np.pi * np.fft.rfftfreq(cols)[None, :] * dc)
    # at a Nyquist frequency only the cosine part keeps the image real (exactly +-1 for whole pixels)
    if rows % 2 == 0:
        phr[..., rows // 2, :] = np.cos(np.pi * dr[..., 0, :])
    if cols % 2 == 0:
        phc[..., :, -1] = np.cos(np.pi * dc[..., :, 0])
    return phr * phc


def fourier_shift(image: np.ndarray, shift_px) -> np.ndarray:
    """Displace the content of ``image`` by ``shift_px = [drow, dcol]`` (periodic, band-limited).

    Whole-pixel shifts reproduce ``np.roll`` exactly (to rounding).
    """
    img = np.asarray(image, dtype=float)
    return np.fft.irfft2(np.fft.rfft2(img) * _shift_phase(img.shape, shift_px), s=img.shape)


def align_stack(stack: np.ndarray, drift_px: np.ndarray) -> np.ndarray:
    """Undo ``drift_px`` (n, 2) for every image of ``stack`` (n, rows, cols), bringing all to the first frame."""
    stack = np.asarray(stack, dtype=float)
    rows, cols = stack.shape[-2:]
    ph = _shift_phase((rows, cols), -np.asarray(drift_px, dtype=float))
    return np.fft.irfft2(np.fft.rfft2(stack, axes=(-2, -1)) * ph, s=(rows, cols), axes=(-2, -1))
