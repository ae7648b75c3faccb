"""The periodic estimator: the plain per-frequency fit on ``rfft2`` cells, exact for a scan that is one period
of the field. The decomposition also uses it for the cheap drift rounds of the windowed estimator (its
leave-one-out template is closed form).
"""

from __future__ import annotations

import numpy as np

from .continuation import ContinuationFit
from .frequencies import pixel_pair_m, rfft_wavenumbers
from .registration import align_stack, average_biases, shift_from_spectra

__all__ = ["fit_continuation_periodic", "leave_one_out_prediction", "fit_with_drift_periodic"]


def fit_continuation_periodic(stack: np.ndarray, *, heights_m, pixel_m, valid: np.ndarray | None = None,
                              stats_mask: np.ndarray | None = None, n_iter: int | None = None, tol: float = 1e-3,
                              max_weight_ratio: float = 10.0) -> ContinuationFit:
    """Fit one complex amplitude per spatial frequency jointly across heights (Laplace continuation).

    Weighted least squares per frequency with closed form
    ``A = sum_h w_h e_h M_h / sum_h w_h e_h^2``, ``w_h = 1/sigma_h^2``, ``e_h = exp(-|q|(h - h_0))``.
    The per-height noise sigma_h is re-estimated from the residuals by the method of moments (the expected
    residual power of every height is linear in all sigma_j^2 for the weights in use; for w = 1/sigma^2
    it reduces to ``E|r_h|^2 = N sigma_h^2 (1 - w_h e_h^2 / sum w e^2)``), iterated ``n_iter`` times. Masked
    pixels are filled with the current model (expectation-maximisation style) between iterations.

    Parameters
    ----------
    stack : ndarray (H, rows, cols)
        Images at each height in signal units; their means are removed here (the q = 0 term is not fitted).
    heights_m : array_like (H,)
        Lift heights [m], increasing.
    pixel_m : float or (float, float)
        Pixel spacing [m]: one value for square pixels, else (row spacing, column spacing).
    valid : ndarray of bool (H, rows, cols), optional
        False where data are missing (NaN pixels are always treated as missing).
    stats_mask : ndarray of bool (rows, cols), optional
        Pixels used for the residual statistics (e.g. excluding borders wrapped by the alignment).
    n_iter : int, optional
        Largest number of re-weighting iterations. By default 1 for complete data (the moment estimator is
        unbiased for any weights, so the estimate from equal weights is already final to ~1e-4 relative)
        and 8 with missing pixels (their fill converges by iteration).
    tol : float
        Stop re-weighting once every sigma_h^2 changed by less than this fraction.
    max_weight_ratio : float
        Largest weight of one height relative to the median weight (floor on sigma_h^2).
    """
    data = np.asarray(stack, dtype=float)
    h = np.asarray(heights_m, dtype=float)
    nh, rows, cols = data.shape
    n = rows * cols
    ok = np.isfinite(data) if valid is None else (np.asarray(valid, bool) & np.isfinite(data))
    complete = bool(ok.all())
    frac = ok.reshape(nh, -1).mean(axis=1)
    if complete:
        data = data - data.mean(axis=(1, 2), keepdims=True)
    else:
        means = np.where(ok, data, 0.0).sum(axis=(1, 2)) / np.maximum(ok.sum(axis=(1, 2)), 1)
        data = np.where(ok, data - means[:, None, None], 0.0)
    q, _, cw = rfft_wavenumbers((rows, cols), pixel_m)
    e = np.exp(-q[None] * (h - h[0])[:, None, None])
    valid_cells = np.ones((rows, cols // 2 + 1), bool)
    valid_cells[0, 0] = False
    e2 = e * e
    cwv = cw * valid_cells
    f = np.fft.rfft2(data, axes=(-2, -1))
    sigma2 = np.ones(nh)
    m = np.eye(nh) * n
    # einsum, not BLAS, throughout: the BLAS thread pool busy-waits and slowed the whole analysis about 2x
    # on a loaded two-core machine.
    # flattened cells (the DC cell carries weight 0)
    e_s = e.reshape(nh, -1)
    e2_s = e2.reshape(nh, -1)
    cwv_s = cwv.ravel()

    def split(f_now):
        # real arithmetic on contiguous parts: no complex temporaries in the loop
        fs = f_now.reshape(nh, -1)
        fr, fi = np.ascontiguousarray(fs.real), np.ascontiguousarray(fs.imag)
        return fr, fi, np.einsum("q,hq,hq->h", cwv_s, fr, fr) + np.einsum("q,hq,hq->h", cwv_s, fi, fi)

    fr_s, fi_s, ff_s = split(f)
    if n_iter is None:
        n_iter = 1 if complete else 8
    for _ in range(max(int(n_iter), 1)):
        w = 1.0 / sigma2
        inv = 1.0 / np.einsum("h,hq->q", w, e2_s)
        ar = np.einsum("h,hq,hq->q", w, e_s, fr_s) * inv
        ai = np.einsum("h,hq,hq->q", w, e_s, fi_s) * inv
        # residual power per height, |f - e A|^2 = |f|^2 - 2 e Re(f* A) + e^2 |A|^2, summed over cells
        cross = np.einsum("q,hq,hq->h", cwv_s * ar, e_s, fr_s) + np.einsum("q,hq,hq->h", cwv_s * ai, e_s, fi_s)
        r2 = np.maximum(ff_s - 2.0 * cross + np.einsum("hq,q->h", e2_s, cwv_s * (ar * ar + ai * ai)), 0.0) / n
        # method of moments, unbiased for any weights: E R_h = sum_j M_hj sigma_j^2 with
        # M_hj = sum_q cw [delta_hj (1 - 2 l_h) + e_h^2 e_j^2 w_j^2 / S^2]  (DC cell excluded)
        m = np.einsum("hq,jq->hj", e2_s * (cwv_s * inv**2), e2_s) * (w**2)[None, :]
        m[np.diag_indices(nh)] += cwv_s.sum() - 2.0 * w * np.einsum("hq,q->h", e2_s, cwv_s * inv)
        try:
            sol = np.linalg.solve(m, r2)
        except np.linalg.LinAlgError:
            sol = r2 / np.maximum(np.diag(m), 1.0)
        # floor: no height may weigh more than max_weight_ratio times the median. A model misfit can drive
        # one height's moment estimate to zero (or below), and its weight would then take over the fit; the
        # detector noise of one series is alike at all heights, so a bounded spread costs nothing real.
        pos = sol[sol > 0]
        floor = np.median(pos) / max_weight_ratio if pos.size else 1e-12 * max(r2.max(), 1e-300)
        new = np.maximum(sol, floor) / np.maximum(frac, 1e-3)
        settled = bool(np.all(np.abs(new - sigma2) <= tol * new))
        sigma2 = new
        if not complete:
            w = 1.0 / sigma2
            amp = np.einsum("h,hij,hij->ij", w, e, f) / np.einsum("h,hij->ij", w, e2)
            amp[0, 0] = 0.0
            data = np.where(ok, data, np.fft.irfft2(amp[None] * e, s=(rows, cols), axes=(-2, -1)))
            f = np.fft.rfft2(data, axes=(-2, -1))
            fr_s, fi_s, ff_s = split(f)
        if settled:
            break
    w = 1.0 / sigma2
    inv_s = 1.0 / np.einsum("h,hij->ij", w, e2)
    amp = np.einsum("h,hij,hij->ij", w, e, f) * inv_s
    amp[0, 0] = 0.0
    pred = amp[None] * e
    model = np.fft.irfft2(pred, s=(rows, cols), axes=(-2, -1))
    resid = data - model if complete else np.where(ok, data - model, np.nan)
    sm = ok if stats_mask is None else ok & np.asarray(stats_mask, bool)[None]
    r0 = np.where(sm, resid, 0.0) if not (complete and stats_mask is None) else resid
    residual_rms = np.sqrt(np.einsum("hij,hij->h", r0, r0) / np.maximum(sm.sum(axis=(1, 2)), 1))
    # residual rms that pure noise would leave: with w = 1/sigma^2, E|r_h|^2 = N sigma_h^2 (1 - l_h) per cell
    lev_sum = w * np.einsum("hq,q->h", e2.reshape(nh, -1), (cwv * inv_s).ravel())
    expected = np.sqrt(np.clip(sigma2 * (cwv.sum() - lev_sum) / n, 0.0, None))

    # noise-debiased power of the fitted map at each height: Var(A e_h) = v_h = N e_h^2 / S per cell, and
    # |A e_h|^2 - v_h = e_h^2 (|A|^2 - N/S): every sum is a matrix-vector product over the cells
    e2f = e2.reshape(nh, -1)
    a2 = (amp.real**2 + amp.imag**2).ravel()
    ninv = n * inv_s.ravel()
    cwf = cwv.ravel()
    noise_power = np.einsum("hq,q->h", e2f, cwf * ninv) / n**2
    power = np.einsum("hq,q->h", e2f, cwf * (a2 - ninv)) / n**2
    c = np.maximum(a2 - ninv, 0.0)
    var_power = 2.0 * np.einsum("hq,hq,q->h", e2f, e2f, cwf * ninv * (2.0 * c + ninv)) / n**4
    rms = np.sqrt(np.clip(power, 0.0, None))
    rms_std = np.where(rms > 0, np.sqrt(var_power) / (2.0 * np.where(rms > 0, rms, 1.0)),
                       var_power**0.25)
    return ContinuationFit(amplitude=amp, model=model, residual=resid, noise_std=np.sqrt(sigma2),
                           magnetic_rms=rms, magnetic_rms_std=rms_std, residual_rms=residual_rms,
                           expected_residual_rms=expected, inverse_weight_sum=inv_s, decay=e,
                           noise_power=noise_power, heights_m=h, pixel_m=pixel_pair_m(pixel_m))


def leave_one_out_prediction(stack: np.ndarray, fit: ContinuationFit) -> np.ndarray:
    """Magnetic image predicted at each height from all *other* heights (H, rows, cols) [s].

    Used to refine the registration against a template that is nearly free of the height's own noise.
    """
    data = np.array(stack, dtype=float)
    data = data - np.nanmean(data, axis=(-2, -1), keepdims=True)
    data[~np.isfinite(data)] = 0.0
    rows, cols = data.shape[-2:]
    f = np.fft.rfft2(data, axes=(-2, -1))
    w = 1.0 / fit.noise_std**2
    e = fit.decay
    num = np.einsum("h,hij->ij", w, e * f)
    den = np.einsum("h,hij->ij", w, e * e)
    num_o = num[None] - w[:, None, None] * e * f
    den_o = den[None] - w[:, None, None] * e * e
    amp = np.where(den_o > 1e-300, num_o / np.where(den_o > 1e-300, den_o, 1.0), 0.0)
    amp[:, 0, 0] = 0.0
    return np.fft.irfft2(amp * e, s=(rows, cols), axes=(-2, -1))


def fit_with_drift_periodic(images: np.ndarray, valid: np.ndarray, drift_px: np.ndarray, *, heights_m, pixel_m,
                            nb: int = 1, rounds: int = 2, refine: bool = True):
    """Align by a periodic (Fourier) shift, fit, and refine the drift against the leave-one-out continuation.

    Each round aligns every image, averages the biases of each height, fits the periodic continuation and
    moves each image's drift towards the template the *other* heights predict for it (nearly noise-free).

    Parameters
    ----------
    images : ndarray (H * nb, rows, cols)
        Mean-free images [s], height-major (image ``i`` is height ``i // nb``).
    valid : ndarray of bool, same shape
        False where data are missing.
    drift_px : ndarray (H * nb, 2)
        Starting drift [px]; the first image's is the frame.
    heights_m, pixel_m
        As for :func:`fit_continuation_periodic`.
    nb : int
        Images per height (biases).
    rounds : int
        Refinement rounds after the first fit.
    refine : bool
        Refine the drift (else fit once at ``drift_px``).

    Returns
    -------
    fit, drift_px, aligned, aligned_valid
    """
    nimg, rows, cols = images.shape
    nh = nimg // nb
    drift = np.array(drift_px, dtype=float, copy=True)
    for round_ in range(rounds + 1 if refine else 1):
        aligned = align_stack(images, drift)
        ok = align_stack(valid.astype(float), np.rint(drift)) > 0.5
        hstack, hvalid = average_biases(aligned, ok, nh, nb)
        fit = fit_continuation_periodic(hstack, heights_m=heights_m, pixel_m=pixel_m, valid=hvalid)
        if not refine or round_ == rounds:
            break
        pred_f = np.fft.rfft2(leave_one_out_prediction(hstack, fit), axes=(-2, -1))
        moving_f = np.fft.rfft2(np.where(ok, aligned, 0.0), axes=(-2, -1))
        for i in range(1, nimg):
            drift[i] = drift[i] + shift_from_spectra(pred_f[i // nb], moving_f[i], (rows, cols))
    return fit, drift, aligned, ok
