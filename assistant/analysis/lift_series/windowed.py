"""The windowed estimator: the scan is a window onto a larger field, and the field outside it is missing data.

Exact up to the edges, and the one iterative fit of the family (in the series analysis about three times the
time of the whole analysis with the reflected fit, on 8 x 256 x 256); drift enters the model, so the images
are never interpolated.
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sp_fft

from .continuation import ContinuationFit
from .frequencies import alias_orders_for, pixel_pair_m, rfft_alias_frequencies, rfft_wavenumbers, self_conjugate_real

__all__ = ["WINDOW_SOLVE", "fit_continuation_windowed"]

# Solver settings of the series analysis, measured on 8 x 256 x 256 with drift against a solve converged to
# tol 1e-9: single-precision operators and two transform threads make a CG step about 2.5x cheaper (a
# single-precision solve still reaches 0.02 of the noise at tol 1e-6). The drift starts from the registration,
# without rounds of the periodic model (see magnetic_fit), and part of the time that saves goes into the solve:
# tol 3e-5 and three drift rounds put the map within 0.80 noise of the converged solve at its worst edge pixel
# (tol 6e-5 after two periodic rounds: 1.25; double precision, tol 1e-4 and ten rounds: 2.6) in 0.92-0.96x the
# time of the whole analysis with the 6e-5 setting. Tol 2.5e-5: 0.56 noise, 1.0-1.15x; 2e-5: 0.38, 1.1-1.2x.
WINDOW_SOLVE = {"single": True, "workers": 2, "tol": 3e-5, "n_reweight": 3}


def _window_statistics(e, cwv, w_h, n, ridge_k=None):
    """Per-height leverage and the per-cell variance factor of the window grid (periodic approximation).

    ``e`` (K, H, r, c): decay of every field to every height. Returns ``inv_s`` (r, c), the fundamental's
    ``(S^-1)_00`` (K = 1: ``1 / sum_h w_h e_h^2``), ``lev`` (H,) and ``var`` (H, r, c) = ``e_h^T S^-1 e_h``.
    """
    nk, nh = e.shape[:2]
    s = np.einsum("h,khab,lhab->ablk", w_h, e, e)
    if ridge_k is not None:
        s = s + np.diag(ridge_k)
    if nk == 1:
        sinv = 1.0 / np.maximum(s, 1e-300)
    else:
        sinv = np.linalg.inv(s)
    var = np.einsum("khab,ablk,lhab->hab", e, sinv, e)
    lev = w_h * np.einsum("hq,q->h", var.reshape(nh, -1), cwv.ravel()) / n
    return sinv[..., 0, 0], lev, var


def _shift_phase(a, b, dr_m, dc_m):
    """Fourier shift multipliers (J, R, Cq) for displacements ``dr_m``, ``dc_m`` (J,) [m] at the frequencies
    ``a``, ``b`` (R, Cq) [1/m]; as an outer product of a row and a column factor where the row frequency
    varies only along rows and the column frequency only along columns."""
    if np.array_equal(a, np.broadcast_to(a[:, :1], a.shape)) and np.array_equal(b, np.broadcast_to(b[:1], b.shape)):
        return (np.exp(-2j * np.pi * a[None, :, :1] * dr_m[:, None, None])
                * np.exp(-2j * np.pi * b[None, :1, :] * dc_m[:, None, None]))
    return np.exp(-2j * np.pi * (a[None] * dr_m[:, None, None] + b[None] * dc_m[:, None, None]))


def fit_continuation_windowed(images: np.ndarray, *, heights_m, pixel_m, height_index=None, drift_px=None,
                              valid: np.ndarray | None = None, pad_px=None, ridge: float = 1e-4,
                              tol: float = 1e-4, max_iter: int = 200, n_reweight: int = 10,
                              max_weight_ratio: float = 10.0, refine_drift: bool = True,
                              alias_axes="auto", alias_ridge: float = 1e-3, noise_std=None,
                              drift_tol_px: float = 1e-3, single: bool = False,
                              workers: int | None = None, start: np.ndarray | None = None) -> ContinuationFit:
    """Laplace continuation of a scan that is a window onto a larger field (no periodicity assumed).

    The unknown is the magnetic image ``U`` at the first height on a grid padded by ``pad_px`` on every
    side; the model of image j (height h_j, drift d_j) is the window of ``U`` continued by
    ``exp(-|q| (h_j - h_0))`` (Hug et al. 1998, J. Appl. Phys. 83, 5609; Wallace 1951, Bell Syst. Tech. J.
    30, 1145; from memory) and displaced by d_j (Fourier shift theorem), minus its mean over the valid
    pixels (the image mean is fitted separately). The field outside the scan is missing data: ``U`` is
    the weighted least-squares solution over the measured pixels only, ``sum_j w_j |P_j(y_j - S K_j U)|^2
    + ridge * mean(w) * |U_pad|^2`` (the small ridge keeps the pad, which no data constrain at short
    wavelengths, determined). Solved by conjugate gradients on the normal equations with FFT operators,
    preconditioned by the mask-free (diagonal in Fourier space) normal operator (Hestenes & Stiefel 1952,
    J. Res. Natl. Bur. Stand. 49, 409; from memory). The data are never interpolated: drift enters the
    model, so the seam of the scan and the border wrapped by a shift never reach the fit.

    Aliasing: along an axis whose pixel spacing is coarse against the lowest height, the scan samples
    content above its Nyquist frequency, which lands on a lower frequency but keeps decaying with its own
    ``|q|``. There two further fields per order (the nearer and the farther alias partner of every frequency,
    see :func:`~.frequencies.rfft_alias_frequencies`) join ``U``, each with its own decay, held by
    ``alias_ridge`` everywhere.
    ``alias_axes="auto"`` aliases an axis whose spacing exceeds 4 h_0 (a rule of thumb, no source: a
    simulated scan with 62.5 nm lines at 10 nm lift left a 1 deg misfit without row aliases; alias fields
    give the lowest heights freedom that also absorbs some real non-Laplace contrast there, so they are not
    used where the sampling does not call for them), with the second order beyond 12 h_0
    (:func:`~.frequencies.alias_orders_for`).

    Noise per height: ``sigma_h^2 = R_h / (1 - l_h)`` (residual power over the valid pixels, leverage
    ``l_h`` of the window grid in the periodic approximation), re-estimated up to ``n_reweight`` times with
    warm-started solves.

    Parameters
    ----------
    images : ndarray (J, rows, cols)
        Raw (unaligned) images [s]; J = heights x biases in any order given by ``height_index``.
    heights_m : array_like (H,)
        Lift heights [m], increasing.
    pixel_m : float or (float, float)
        Pixel spacing [m].
    height_index : array_like of int (J,), optional
        Height of each image (default: image j is height j).
    drift_px : ndarray (J, 2), optional
        ``[drow, dcol]`` content displacement of each image relative to the reference frame [px].
    valid : ndarray of bool (J, rows, cols), optional
        False where data are missing (NaN pixels always are).
    pad_px : int or (int, int), optional
        Pad on each side [px]; default ``2 (h_max - h_0) / pixel + 4`` per axis, the range over which the
        continuation kernel (a Poisson kernel of width h - h_0) carries the outside field into the scan.
    ridge : float
        Penalty on the pad relative to the mean image weight.
    tol : float
        Relative residual of the preconditioned normal equations at which the solve stops.
    refine_drift : bool
        Refine every drift by Gauss-Newton steps alternating with the field solve (``drift_px`` is the
        starting point; the first image keeps defining the frame); returned in ``drift_px``.
    alias_axes : "auto" or sequence of {0, 1}
        Axes (0 = rows, 1 = columns) with alias fields.
    alias_ridge : float
        Penalty on the alias fields relative to the mean image weight.
    noise_std : array_like (H,), optional
        Noise of one image at every height, measured independently of the fit: the weights stay
        ``1 / noise_std^2`` and the rounds only refine the drift, until no step exceeds ``drift_tol_px``.
    drift_tol_px : float
        Drift steps [px] below which the rounds stop.
    single : bool
        Run the CG operators in single precision (float32 images, complex64 transforms); the solution is
        accumulated and the inner products summed in double precision, and the residuals, drift steps and
        returned maps are computed in double precision.
    workers : int, optional
        Threads of each FFT (scipy.fft); default 1.
    start : ndarray, optional
        Where the solve starts: the ``solution`` of an earlier fit of nearly the same data on the same grid (same
        shape, drift and heights); ignored if its shape differs. Default zero.

    Returns
    -------
    ContinuationFit
        ``model`` (H, rows, cols) in the reference frame, *including* its window mean (``window_mean``);
        ``residual`` (H, rows, cols) averaged over the images of each height (NaN where none is valid);
        ``noise_std`` the noise of the height's averaged image; ``amplitude``, ``decay``,
        ``inverse_weight_sum`` on the window grid (periodic approximation, for the resolution and the
        standard errors).
    """
    with sp_fft.set_workers(workers if workers is not None else 1):
        return _fit(images, heights_m, pixel_m, height_index, drift_px, valid, pad_px, ridge, tol, max_iter, n_reweight,
                    max_weight_ratio, refine_drift, alias_axes, alias_ridge, noise_std, drift_tol_px, single, start)


def _fit(images, heights_m, pixel_m, height_index, drift_px, valid, pad_px, ridge, tol, max_iter, n_reweight,
         max_weight_ratio, refine_drift, alias_axes, alias_ridge, noise_std, drift_tol_px, single, start):
    y = np.asarray(images, dtype=float)
    h = np.asarray(heights_m, dtype=float)
    nh = h.size
    nj, rows, cols = y.shape
    hi = np.arange(nj) if height_index is None else np.asarray(height_index, dtype=int)
    per_h = np.bincount(hi, minlength=nh).astype(float)
    ok = np.isfinite(y) if valid is None else (np.asarray(valid, bool) & np.isfinite(y))
    pr, pc = pixel_pair_m(pixel_m)
    orders = alias_orders_for(alias_axes, (pr, pc), h[0], nh)
    d = (np.zeros((nj, 2)) if drift_px is None else np.asarray(drift_px, dtype=float).reshape(nj, 2)).copy()
    dh = h[-1] - h[0]
    if pad_px is None:
        pad = (int(np.ceil(2.0 * dh / pr)) + 4, int(np.ceil(2.0 * dh / pc)) + 4)
    else:
        pad = tuple(int(v) for v in np.broadcast_to(np.asarray(pad_px), (2,)))
    extra = np.ceil(np.abs(d).max(axis=0)) + 2 if nj else np.zeros(2)
    big_r = sp_fft.next_fast_len(int(rows + 2 * pad[0] + extra[0]), real=True)
    big_c = sp_fft.next_fast_len(int(cols + 2 * pad[1] + extra[1]), real=True)
    shape = (big_r, big_c)
    y0 = np.where(ok, y, 0.0)
    ok_data = ok
    # the window sits at [0:rows, 0:cols]; the grid is periodic, so the pad surrounds it on every side
    fr_big = np.fft.fftfreq(big_r)[:, None] / pr  # cycles per metre
    fc_big = np.fft.rfftfreq(big_c)[None, :] / pc
    freqs = rfft_alias_frequencies(fr_big, fc_big, pr, pc, orders)
    nk = len(freqs)
    e_big = np.array([np.exp(-2.0 * np.pi * np.hypot(a, b)[None] * (h - h[0])[:, None, None]) for a, b in freqs])
    in_window = np.zeros(shape, bool)
    in_window[:rows, :cols] = True
    frac = rows * cols / (big_r * big_c)
    rr, cc = np.arange(rows)[:, None], np.arange(cols)[None, :]
    g = gc = ok = okf = n_ok = None
    ops = {}
    cg_type = np.float32 if single else np.float64

    def set_drift(dd):
        # operators for drift dd; the band a periodic shift would wrap in is left out, so data that were
        # shifted periodically (synthetic) and real scans are treated alike
        nonlocal g, gc, ok, okf, n_ok, ops
        ph = [_shift_phase(a, b, pr * dd[:, 0], pc * dd[:, 1]) for a, b in freqs]
        g = self_conjugate_real(np.array([e_big[k][hi] * ph[k] for k in range(nk)]), shape)  # (K, J, R, Cq)
        gc = np.conj(g)
        lo = np.ceil(np.clip(dd, 0, None))
        up = np.ceil(np.clip(-dd, 0, None))
        inside = ((rr[None] >= lo[:, 0, None, None]) & (rr[None] < rows - up[:, 0, None, None])
                  & (cc[None] >= lo[:, 1, None, None]) & (cc[None] < cols - up[:, 1, None, None]))
        ok = ok_data & inside
        okf = ok.astype(float)
        n_ok = np.maximum(ok.sum(axis=(1, 2)), 1)
        ops = {np.float64: (g, gc, okf)}
        if single:
            ops[np.float32] = (g.astype(np.complex64), gc.astype(np.complex64), okf.astype(np.float32))

    set_drift(d)

    def centred(m):
        mk = ops[m.dtype.type][2]
        m = m * mk
        return (m - (m.sum(axis=(1, 2)) / n_ok).astype(m.dtype)[:, None, None]) * mk

    def forward(x):
        # x float32 runs the operator in single precision (complex64 transforms), float64 in double
        gg = ops[x.dtype.type][0]
        xs = sp_fft.rfft2(x, axes=(-2, -1))
        spec = xs[0][None] * gg[0] if nk == 1 else np.einsum("kab,kjab->jab", xs, gg)
        # only the window's rows and columns are needed: inverse along rows, crop, then along columns
        half = sp_fft.ifft(spec, axis=-2, overwrite_x=True)[:, :rows]
        return centred(sp_fft.irfft(half, n=big_c, axis=-1)[:, :, :cols])

    def adjoint(r_w):
        # the image is zero outside the window: transform its rows zero-padded, then its columns
        gg = ops[r_w.dtype.type][1]
        spec = sp_fft.fft(sp_fft.rfft(r_w, n=big_c, axis=-1), n=big_r, axis=-2, overwrite_x=True)
        both = (gg[0] * spec).sum(axis=0)[None] if nk == 1 else np.einsum("kjab,jab->kab", gg, spec)
        return sp_fft.irfft2(both, s=shape, axes=(-2, -1))

    known = noise_std is not None
    sigma2 = np.asarray(noise_std, dtype=float) ** 2 if known else np.ones(nh)
    x = np.zeros((nk,) + shape)
    if start is not None and np.shape(start) == x.shape:
        x[...] = start
    total_iter = 0
    q_win, _, cw = rfft_wavenumbers((rows, cols), (pr, pc))
    fr_w = np.fft.fftfreq(rows)[:, None] / pr
    fc_w = np.fft.rfftfreq(cols)[None, :] / pc
    e_win = np.array([np.exp(-2.0 * np.pi * np.hypot(a, b)[None] * (h - h[0])[:, None, None])
                      for a, b in rfft_alias_frequencies(fr_w, fc_w, pr, pc, orders)])
    cwv = np.array(cw, dtype=float)
    cwv[0, 0] = 0.0
    n = rows * cols
    n_rounds = max(int(n_reweight), 1)
    last_step = np.inf
    pad_mask = np.where(in_window, 0.0, 1.0)
    for round_ in range(n_rounds):
        wj = 1.0 / sigma2[hi]
        lam = ridge * float(wj.mean())
        lam_a = alias_ridge * float(wj.mean())
        ridge_field = np.array([pad_mask * lam] + [np.full(shape, lam_a)] * (nk - 1))
        s_big = np.einsum("j,kjab->kab", wj, e_big[:, hi] ** 2)
        precond = 1.0 / (frac * s_big + np.array([lam * (1.0 - frac)] + [lam_a] * (nk - 1))[:, None, None])
        precond[0, 0, 0] = 1.0 / (lam * (1.0 - frac))

        wj_c, ridge_c, precond_c = (wj.astype(cg_type)[:, None, None], ridge_field.astype(cg_type),
                                    precond.astype(cg_type))

        def normal(v):
            return adjoint(wj_c * forward(v)) + ridge_c * v

        def apply_precond(v):
            return sp_fft.irfft2(sp_fft.rfft2(v, axes=(-2, -1)) * precond_c, s=shape, axes=(-2, -1))

        def dot(u, v):  # summed in double precision
            return float(np.multiply(u, v).sum(dtype=np.float64))

        yc = centred(y0)
        b = adjoint(wj[:, None, None] * yc).astype(cg_type)
        xc = x.astype(cg_type)
        r = b - normal(xc)
        z = apply_precond(r)
        p = z.copy()
        rz = dot(r, z)
        b_norm = dot(b, apply_precond(b))
        for _ in range(int(max_iter)):
            if rz <= tol**2 * b_norm:
                break
            ap = normal(p)
            alpha = rz / dot(p, ap)
            x += alpha * p
            r -= alpha * ap
            z = apply_precond(r)
            rz_new = dot(r, z)
            p = z + (rz_new / rz) * p
            rz = rz_new
            total_iter += 1
        resid = yc - forward(x)
        r2 = np.bincount(hi, weights=(resid**2).sum(axis=(1, 2)), minlength=nh) / np.bincount(
            hi, weights=n_ok, minlength=nh)
        w_h = per_h / sigma2
        _, lev, _ = _window_statistics(e_win, cwv, w_h, n, [0.0] + [alias_ridge * float(w_h.mean())] * (nk - 1))
        lev_img = lev / np.maximum(per_h, 1.0)  # leverage of one image of the height
        if known:
            settled = True
        else:
            new = r2 / np.clip(1.0 - lev_img, 1e-3, None)
            floor = np.median(new[new > 0]) / max_weight_ratio if np.any(new > 0) else 1e-300
            new = np.maximum(new, floor)
            settled = bool(np.all(np.abs(new - sigma2) <= 1e-2 * new))
            sigma2 = new
        if settled and round_ > 0 and last_step < drift_tol_px:
            break
        step = np.zeros((nj, 2))
        if refine_drift and nj > 1 and round_ < n_rounds - 1:
            # Gauss-Newton step of every drift: alternating with the field solve, this reaches the joint
            # least-squares optimum over the field and the drifts
            xf_now = sp_fft.rfft2(x, axes=(-2, -1))
            grads = []
            for axis in (0, 1):
                spec = sum(xf_now[k][None] * g[k] * (-2j * np.pi * (freqs[k][axis] * (pr, pc)[axis]))
                           for k in range(nk))
                grads.append(centred(sp_fft.irfft2(spec, s=shape, axes=(-2, -1))[:, :rows, :cols]))
            a11 = (grads[0] ** 2).sum(axis=(1, 2))
            a22 = (grads[1] ** 2).sum(axis=(1, 2))
            a12 = (grads[0] * grads[1]).sum(axis=(1, 2))
            b1 = (grads[0] * resid).sum(axis=(1, 2))
            b2 = (grads[1] * resid).sum(axis=(1, 2))
            det = a11 * a22 - a12**2
            good = det > 1e-12 * np.maximum(a11 * a22, 1e-300)
            step[:, 0] = np.where(good, (a22 * b1 - a12 * b2) / np.where(good, det, 1.0), 0.0)
            step[:, 1] = np.where(good, (a11 * b2 - a12 * b1) / np.where(good, det, 1.0), 0.0)
            step = np.clip(step, -0.5, 0.5)
            # the first image defines the frame: its own step moves the field instead. Holding it fixed
            # alone leaves a valley (the field follows the majority of images) that alternation crawls along
            s0 = step[0].copy()
            shift0 = [np.exp(-2j * np.pi * (a * pr * s0[0] + b * pc * s0[1])) for a, b in freqs]
            x = sp_fft.irfft2(xf_now * self_conjugate_real(np.array(shift0), shape), s=shape, axes=(-2, -1))
            step = step - s0
            d += step
            set_drift(d)
        last_step = float(np.abs(step).max())
    w_h = per_h / sigma2  # weight of the height's averaged image
    inv_s, lev, var_cell = _window_statistics(e_win, cwv, w_h, n,
                                              [0.0] + [alias_ridge * float(w_h.mean())] * (nk - 1))
    xf = sp_fft.rfft2(x, axes=(-2, -1))
    model = sp_fft.irfft2(np.einsum("kab,khab->hab", xf, e_big), s=shape, axes=(-2, -1))[:, :rows, :cols]
    window_mean = model.mean(axis=(1, 2))
    cnt = np.zeros((nh, rows, cols))
    acc = np.zeros((nh, rows, cols))
    np.add.at(cnt, hi, ok.astype(float))
    np.add.at(acc, hi, np.where(ok, resid, 0.0))
    residual = np.where(cnt > 0, acc / np.maximum(cnt, 1.0), np.nan)
    noise_avg2 = sigma2 / per_h
    counts = np.bincount(hi, weights=n_ok, minlength=nh)
    residual_rms = np.sqrt(np.bincount(hi, weights=(resid**2).sum(axis=(1, 2)), minlength=nh) / counts / per_h)
    expected = np.sqrt(noise_avg2 * np.clip(1.0 - lev, 0.0, None))
    amp = np.fft.rfft2(model[0] - window_mean[0])
    amp[0, 0] = 0.0
    e0 = e_win[0]
    e2f = (e0**2).reshape(nh, -1)
    cwf = cwv.ravel()
    vf = (n * var_cell).reshape(nh, -1)  # Var of the fitted map per cell at each height, times N
    noise_power = np.einsum("hq,q->h", vf, cwf) / n**2
    power = np.mean((model - window_mean[:, None, None]) ** 2, axis=(1, 2)) - noise_power
    # standard error of the power from the window-grid spectrum of the fitted map (periodic approximation)
    a2 = (amp.real**2 + amp.imag**2).ravel()
    c = np.maximum(e2f * a2[None] - vf, 0.0)
    var_power = 2.0 * np.einsum("hq,hq->h", vf * (2.0 * c + vf), np.broadcast_to(cwf, vf.shape)) / n**4
    rms = np.sqrt(np.clip(power, 0.0, None))
    rms_std = np.where(rms > 0, np.sqrt(var_power) / (2.0 * np.where(rms > 0, rms, 1.0)), var_power**0.25)
    return ContinuationFit(amplitude=amp, model=model, residual=residual, noise_std=np.sqrt(noise_avg2),
                           magnetic_rms=rms, magnetic_rms_std=rms_std, residual_rms=residual_rms,
                           expected_residual_rms=expected, inverse_weight_sum=inv_s, decay=e0,
                           noise_power=noise_power, heights_m=h, pixel_m=(pr, pc), window_mean=window_mean,
                           iterations=total_iter, drift_px=d, solution=x)
