"""Drift of a non-periodic series refined jointly with its reflected-edge continuation.

Images are realigned by a band-limited shift of their reflected extension (the extension the cosine basis of
:func:`~.reflected.fit_continuation_reflected` assumes), never by a periodic shift
of the scan itself, so no content wraps round. The drift of every image is then refined by Gauss-Newton steps
on the interior residual against the fitted continuation, alternating with the fit; the first image defines
the frame.

Convention as in :mod:`.registration`: ``drift_px = [drow, dcol]`` is how far the content
of an image is displaced relative to the first, ``moving(r, c) = reference(r - drow, c - dcol)``.
"""

from __future__ import annotations

import numpy as np

from .continuation import ContinuationFit
from .image_noise import fill_missing
from .reflected import fit_continuation_reflected
from .registration import average_biases

__all__ = ["reflect_align", "fit_with_drift_reflected"]


def _reflect_shift_axis(x: np.ndarray, shift: np.ndarray, axis: int) -> np.ndarray:
    """Displace the content of every image of ``x`` (n, rows, cols) by ``shift`` (n,) px along ``axis``.

    Band-limited (Fourier) shift of the half-sample symmetric extension ``x_0..x_{N-1}, x_{N-1}..x_0``,
    the extension the type-II cosine transform implies (Strang 1999, SIAM Rev. 41, 135; from memory):
    periodic with period 2N and continuous, so nothing wraps round and no seam rings.
    """
    n = x.shape[axis]
    ext = np.concatenate([x, np.flip(x, axis=axis)], axis=axis)
    f = np.fft.rfftfreq(2 * n).reshape([-1 if a == axis else 1 for a in range(3)])
    ph = np.exp(-2j * np.pi * f * shift.reshape(-1, 1, 1))
    # at the Nyquist frequency only the cosine part keeps the image real
    nyq = [slice(None)] * 3
    nyq[axis] = slice(-1, None)
    ph[tuple(nyq)] = ph[tuple(nyq)].real
    # numpy's FFT: as fast as scipy.fft along either axis with numpy 2.4 (20-22 ms for both axes of 8 x 256 x 256),
    # and the series analysis no longer loads scipy.fft (0.15-0.2 s)
    spec = np.fft.rfft(ext, axis=axis)
    spec *= ph
    out = np.fft.irfft(spec, n=2 * n, axis=axis)
    keep = [slice(None)] * 3
    keep[axis] = slice(0, n)
    return out[tuple(keep)]


def reflect_align(images: np.ndarray, valid: np.ndarray, drift_px: np.ndarray):
    """Undo ``drift_px`` (n, 2) of every image (n, rows, cols) by a band-limited shift with reflecting edges.

    A band-limited shift keeps white noise white (a spline or bilinear interpolation would smooth it, by up to
    a factor 0.8 in noise amplitude at a fractional shift, and bias every noise estimate after it). Missing
    pixels are first filled by normalised convolution (a Gaussian of 2 px; Knutsson & Westin 1993, Proc. IEEE
    CVPR, 515; from memory) so that the interpolation does not carry a hole into its neighbours; a pixel stays
    valid only if every input it interpolates from nearby was (bilinear weights of the mask). Returns
    (aligned, valid).
    """
    img = np.asarray(images, dtype=float)
    ok = np.asarray(valid, bool)
    d = np.asarray(drift_px, dtype=float).reshape(-1, 2)
    img = fill_missing(img, ok)
    aligned = _reflect_shift_axis(_reflect_shift_axis(img, -d[:, 0], 1), -d[:, 1], 2)
    out_ok = ok.copy()
    holes = np.nonzero(~ok.reshape(ok.shape[0], -1).all(axis=1))[0]  # only images with holes
    if holes.size:
        from scipy import ndimage  # fill_missing has loaded it

        for i in holes:
            out_ok[i] = ndimage.shift(ok[i].astype(float), -d[i], order=1, mode="reflect") > 1.0 - 1e-6
    return aligned, out_ok


def _gauss_newton_steps(aligned, valid, model, height_index, band):
    """One Gauss-Newton step of every image's drift from the interior residual against the model [px].

    With the drift off by e, the aligned image is ``ref(x - e) ~ model - e . grad(model)``, so
    ``e = -(J^T J)^-1 J^T r`` with ``J = grad(model)`` and ``r`` the residual about its mean (both over the
    image's valid interior pixels). All images at once, with ``einsum`` (the BLAS dot products of a loop over
    images spun the thread pool and took half the analysis on two loaded cores).
    """
    n, rows, cols = aligned.shape
    core = (slice(None), slice(band, rows - band), slice(band, cols - band))
    hi = np.asarray(height_index, int)
    gy, gx = np.gradient(np.asarray(model), axis=(1, 2))  # central differences, per height
    gy, gx = gy[core][hi], gx[core][hi]
    r = aligned[core] - np.asarray(model)[core][hi]
    w = np.asarray(valid, bool)[core].astype(r.dtype)
    cnt = np.einsum("jab->j", w)
    ok = cnt >= 16
    cnt = np.maximum(cnt, 1.0)

    def centred_dot(a, b):
        # sum over valid pixels of (a - mean a)(b - mean b)
        return (np.einsum("jab,jab,jab->j", w, a, b, dtype=np.float64)
                - np.einsum("jab,jab->j", w, a, dtype=np.float64) * np.einsum("jab,jab->j", w, b, dtype=np.float64)
                / cnt)

    a11, a12, a22 = centred_dot(gy, gy), centred_dot(gy, gx), centred_dot(gx, gx)
    b1, b2 = -centred_dot(gy, r), -centred_dot(gx, r)
    det = a11 * a22 - a12**2
    good = ok & (det > 1e-12 * np.maximum(a11 * a22, 1e-300))
    det = np.where(good, det, 1.0)
    steps = np.zeros((n, 2))
    steps[:, 0] = np.where(good, (a22 * b1 - a12 * b2) / det, 0.0)
    steps[:, 1] = np.where(good, (a11 * b2 - a12 * b1) / det, 0.0)
    return np.clip(steps, -0.5, 0.5)


def fit_with_drift_reflected(images: np.ndarray, valid: np.ndarray, drift_px: np.ndarray, *, heights_m, pixel_m,
                             nb: int = 1, interior_px: int = 0, refine: bool = True, max_rounds: int = 8,
                             tol_px: float = 0.005, noise_std: np.ndarray | None = None, noise_dof=None,
                             weight_std=None) -> tuple[ContinuationFit, np.ndarray, np.ndarray, np.ndarray]:
    """Align, fit the reflected-edge continuation, and refine the drift until it settles.

    The first fit weighs the heights equally, every later one by the noise the fit before it found (see
    :func:`~.reflected.fit_continuation_reflected`), so that the last one is robust
    to a height whose residual shows more than noise; it is always a weighted fit at the final drift.

    Parameters
    ----------
    images : ndarray (H * nb, rows, cols)
        Raw, mean-free images [s], height-major (image ``i`` is height ``i // nb``).
    valid : ndarray of bool, same shape
        False where data are missing.
    drift_px : ndarray (H * nb, 2)
        Starting drift [px]; the first image's is the frame and stays.
    heights_m, pixel_m
        As for :func:`~.reflected.fit_continuation_reflected`.
    nb : int
        Images per height (biases), averaged after alignment.
    interior_px : int
        Edge band left out of the fit's statistics and of the drift steps [px].
    refine : bool
        Refine the drift (else fit once at ``drift_px``).
    max_rounds : int
        Largest number of drift steps (each followed by a fit).
    tol_px : float
        Stop once no image's step exceeds this [px].
    noise_std : ndarray (H,), optional
        Noise of every height's (bias-averaged) image, measured independently of the fit: every fit is weighted
        by it and uses it for its statistics (``noise_known``), so the weights do not change from round to
        round and the result does not depend on how many rounds ran once the drift has settled.
    noise_dof : float or ndarray (H,), optional
        Degrees of freedom of that noise estimate (see
        :func:`~.reflected.fit_continuation_reflected`).
    weight_std : ndarray (H,), optional
        With ``noise_std``: the noise the heights are weighted by, if not that one.

    Returns
    -------
    fit, drift_px, aligned, aligned_valid
    """
    nimg = images.shape[0]
    nh = nimg // nb
    hi = np.repeat(np.arange(nh), nb)
    drift = np.array(drift_px, dtype=float, copy=True)
    drift[0] = 0.0

    known = noise_std is not None

    def align_and_fit(noise=None, final=True):
        aligned, ok = reflect_align(images, valid, drift)
        hstack, hvalid = average_biases(aligned, ok, nh, nb)
        fit = fit_continuation_reflected(hstack, heights_m=heights_m, pixel_m=pixel_m, valid=hvalid,
                                         interior_px=interior_px, noise_std=noise_std if known else noise,
                                         noise_known=known, noise_dof=noise_dof if known else None,
                                         rms_std=final, weight_std=weight_std if known else None)
        return fit, aligned, ok

    # without a measured noise: the first fit weighs the heights equally, every later one by the noise the one
    # before found
    rounds = max(int(max_rounds), 1) if refine and nimg > 1 else 0
    fit, aligned, ok = align_and_fit(final=not (known and rounds))
    for round_ in range(rounds):
        steps = _gauss_newton_steps(aligned, ok, fit.model, hi, interior_px)
        steps -= steps[0]  # the model follows the majority of images; the first image keeps the frame
        drift += steps
        last = bool(np.abs(steps).max() < tol_px) or round_ == rounds - 1
        fit, aligned, ok = align_and_fit(fit.noise_std, final=last or not known)
        if last:
            break
    if not known:
        fit, aligned, ok = align_and_fit(fit.noise_std)
    return fit, drift, aligned, ok
