"""Sub-pixel registration of the images of a lift-height series.

Convention: ``drift_px = [drow, dcol]`` is how many pixels the image content is displaced relative to the
reference, i.e. ``moving(r, c) = reference(r - drow, c - dcol)``. Images are treated as periodic (FFT).
Spectra here are ``numpy.fft.rfft2`` half-planes of real images.
"""

from __future__ import annotations

import numpy as np

from assistant.errors import InputError

from .frequencies import rfft_cell_weights

__all__ = ["estimate_shift_px", "shift_from_spectra", "estimate_drift_px", "fourier_shift", "align_stack",
           "average_biases"]


def _upsampled_correlation(cross: np.ndarray, shape: tuple[int, int], size: int, factor: int,
                           centre: np.ndarray) -> np.ndarray:
    """Correlation of a half-plane cross spectrum on a ``size x size`` grid of spacing 1/factor px.

    Matrix-multiply DFT (Guizar-Sicairos, Thurman & Fienup 2008, Opt. Lett. 33, 156), on the half plane:
    for real images ``c(x) = sum_half cw Re(C(q) exp(i q x))``.
    """
    rows, cols = shape
    fr = np.fft.fftfreq(rows) * rows
    fc = np.arange(cols // 2 + 1, dtype=float)
    grid = (np.arange(size) - size // 2) / factor
    ar = 2.0 * np.pi / rows * np.outer(grid + centre[0], fr)
    ac = 2.0 * np.pi / cols * np.outer(fc, grid + centre[1])
    kcr, kci = np.cos(ac) * rfft_cell_weights(cols)[:, None], np.sin(ac) * rfft_cell_weights(cols)[:, None]
    cr, ci = np.ascontiguousarray(cross.real), np.ascontiguousarray(cross.imag)
    # real arithmetic with einsum: no BLAS thread pool, whose busy-waiting threads slowed everything else
    # down by about 2x on a loaded two-core machine
    pr = np.einsum("ij,jk->ik", cr, kcr) - np.einsum("ij,jk->ik", ci, kci)
    pi = np.einsum("ij,jk->ik", cr, kci) + np.einsum("ij,jk->ik", ci, kcr)
    return np.einsum("ij,jk->ik", np.cos(ar), pr) - np.einsum("ij,jk->ik", np.sin(ar), pi)


def _fill_nan(img: np.ndarray) -> np.ndarray:
    img = np.asarray(img, dtype=float)
    bad = ~np.isfinite(img)
    if np.any(bad):
        img = np.where(bad, np.mean(img[~bad]) if np.any(~bad) else 0.0, img)
    return img - img.mean()


def shift_from_spectra(reference_f: np.ndarray, moving_f: np.ndarray, shape: tuple[int, int], *,
                       upsample: int = 100, whitening: float = 0.0) -> np.ndarray:
    """``[drow, dcol]`` of the moving image from two rfft2 spectra (see :func:`estimate_shift_px`)."""
    rows, cols = shape
    cross = moving_f * np.conj(reference_f)
    if whitening > 0:
        mag = np.abs(cross)
        floor = 1e-12 * mag.max() if mag.max() > 0 else 1.0
        cross = cross / np.maximum(mag, floor) ** whitening
    corr = np.fft.irfft2(cross, s=shape)
    r0, c0 = np.unravel_index(np.argmax(corr), corr.shape)
    shift = np.array([r0 - rows if r0 > rows // 2 else r0, c0 - cols if c0 > cols // 2 else c0], dtype=float)
    if upsample <= 1:
        return shift
    # parabolic vertex through the 3-point neighbourhoods, then matrix-DFT refinement on 1/20 px over
    # +-0.35 px and on 1/upsample px over +-0.06 px (small grids keep the DFT cheap)
    for axis, (a, b, c) in enumerate(((corr[r0 - 1, c0], corr[r0, c0], corr[(r0 + 1) % rows, c0]),
                                      (corr[r0, c0 - 1], corr[r0, c0], corr[r0, (c0 + 1) % cols]))):
        den = a - 2.0 * b + c
        if den < 0:
            shift[axis] += float(np.clip(0.5 * (a - c) / den, -0.5, 0.5))
    for factor, half_px in ((20, 0.35), (max(int(upsample), 20), 0.06)):
        half = max(int(np.ceil(half_px * factor)), 1)
        up = _upsampled_correlation(cross, shape, 2 * half + 1, factor, shift)
        i, j = np.unravel_index(np.argmax(up), up.shape)
        shift = shift + (np.array([i, j], dtype=float) - half) / factor
    return shift


def estimate_shift_px(reference: np.ndarray, moving: np.ndarray, *, upsample: int = 100,
                      whitening: float = 0.0) -> np.ndarray:
    """Sub-pixel displacement of ``moving`` relative to ``reference`` by cross-correlation.

    The cross spectrum ``M conj(R)`` is divided by ``|M conj(R)|**whitening`` (1 = pure phase correlation,
    0 = plain cross-correlation, the default: the matched filter for white noise, measured more precise
    here when the images are noisy and blurred differently). The integer peak is refined to 1/upsample px
    by a matrix-multiply DFT (Guizar-Sicairos, Thurman & Fienup 2008, Opt. Lett. 33, 156). Any real,
    symmetric spectral weight leaves the peak at the true shift, so images blurred by different amounts
    (different lift heights) register without bias. NaN pixels are replaced by the image mean.

    Returns
    -------
    ndarray
        ``[drow, dcol]`` [px].
    """
    ref = _fill_nan(reference)
    mov = _fill_nan(moving)
    if ref.shape != mov.shape:
        raise InputError(f"image shapes differ: {ref.shape} vs {mov.shape}")
    return shift_from_spectra(np.fft.rfft2(ref), np.fft.rfft2(mov), ref.shape, upsample=upsample,
                              whitening=whitening)


def estimate_drift_px(stack: np.ndarray, *, upsample: int = 100, whitening: float = 0.0) -> np.ndarray:
    """Drift of every image of ``stack`` (n, rows, cols) relative to the first: (n, 2) ``[drow, dcol]``."""
    stack = np.array([_fill_nan(img) for img in np.asarray(stack, dtype=float)])
    spectra = np.fft.rfft2(stack, axes=(-2, -1))
    out = np.zeros((stack.shape[0], 2))
    for i in range(1, stack.shape[0]):  # loop over images, vectorised inside
        out[i] = shift_from_spectra(spectra[0], spectra[i], stack.shape[-2:], upsample=upsample,
                                    whitening=whitening)
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
    spectra = np.fft.rfft2(stack, axes=(-2, -1))
    spectra *= _shift_phase((rows, cols), -np.asarray(drift_px, dtype=float))  # in place: one stack less in memory
    return np.fft.irfft2(spectra, s=(rows, cols), axes=(-2, -1))


def average_biases(aligned: np.ndarray, valid: np.ndarray, nh: int, nb: int):
    """Average (nh * nb, rows, cols) aligned images over the nb biases of each height, ignoring missing pixels.

    Returns the (nh, rows, cols) stack (NaN where no bias is valid) and its validity.
    """
    rows, cols = aligned.shape[-2:]
    w = valid.reshape(nh, nb, rows, cols)
    num = np.where(w, aligned.reshape(nh, nb, rows, cols), 0.0).sum(axis=1)
    cnt = w.sum(axis=1)
    return np.where(cnt > 0, num / np.maximum(cnt, 1), np.nan), cnt > 0
