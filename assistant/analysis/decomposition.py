"""Joint decomposition of a lift-height series: magnetic continuation and the image-mean parts.

Magnetic part: above the film every spatial Fourier component of the stray field, and so of the force
gradient on a point-probe tip (monopole or dipole, any finite oscillation amplitude), decays as
``exp(-|q| z)`` (Laplace's equation; Hug et al. 1998, J. Appl. Phys. 83, 5609; Wallace 1951, Bell Syst.
Tech. J. 30, 1145; from memory). One complex amplitude ``A(q)`` per spatial frequency is fitted jointly
across all heights, weighted by each height's noise: ``M_h(q) = A(q) exp(-|q| (h - h_0))``.

Image mean: a magnetic film large compared with the scan has no magnetic mean, so the mean of each image
is electrostatic plus short-range. Heights only: a weighted linear fit of two shapes (amplitude-weighted
``1/2 C''(z)`` and the Hamaker sphere gradient). Bias grid: a parabola in V per height with a common
vertex V_cpd.

All functions work in a *signal* unit chosen by the caller: the force gradient [N/m] when k and Q are
known (the exact ``-arctan`` phase relation is inverted per pixel, so parts add linearly) or the phase
itself [deg] (small-angle approximation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sp_fft
from scipy import optimize


__all__ = [
    "pixel_pair_m",
    "dct_frequencies",
    "alias_axes_for",
    "ContinuationFit",
    "fit_continuation",
    "fit_continuation_windowed",
    "leave_one_out_prediction",
    "resolution_period_m",
    "MeanFit",
    "fit_mean_heights",
    "fit_mean_bias_grid",
]


def pixel_pair_m(pixel_m) -> tuple[float, float]:
    """``(row spacing, column spacing)`` [m] from a scalar (square pixels) or a pair; both must be > 0."""
    p = np.atleast_1d(np.asarray(pixel_m, dtype=float))
    if p.size == 1:
        p = np.array([p[0], p[0]])
    if p.size != 2 or not np.all(np.isfinite(p)) or np.any(p <= 0):
        raise ValueError(f"pixel_m must be a spacing > 0 m or a (row, column) pair of them, got {pixel_m!r}")
    return float(p[0]), float(p[1])


def _wavenumbers(shape: tuple[int, int], pixel_m):
    rows, cols = shape
    pr, pc = pixel_pair_m(pixel_m)
    fr = np.fft.fftfreq(rows)[:, None] / pr
    fc = np.fft.rfftfreq(cols)[None, :] / pc
    f = np.sqrt(fr**2 + fc**2)  # cycles per metre
    cw = np.full((1, cols // 2 + 1), 2.0)  # each half-plane cell stands for itself and its conjugate
    cw[0, 0] = 1.0
    if cols % 2 == 0:
        cw[0, -1] = 1.0
    return 2.0 * np.pi * f, f, np.broadcast_to(cw, f.shape)


def dct_frequencies(shape: tuple[int, int], pixel_m) -> tuple[np.ndarray, np.ndarray]:
    """Row and column frequencies [cycles/m] of the cells of a type-II DCT, shapes (rows, 1) and (1, cols).

    Cell k of an axis of N samples spaced p holds ``cos(pi k (i + 1/2) / N)``, frequency ``k / (2 N p)``.
    """
    rows, cols = shape
    pr, pc = pixel_pair_m(pixel_m)
    return (np.arange(rows) / (2.0 * rows * pr))[:, None], (np.arange(cols) / (2.0 * cols * pc))[None, :]


@dataclass(frozen=True)
class ContinuationFit:
    """Result of :func:`fit_continuation` (signal units s of the caller; N = rows * cols).

    Attributes
    ----------
    amplitude : ndarray, complex (rows, cols//2+1)
        Fitted rfft2 coefficients A(q) at the first height.
    model : ndarray (H, rows, cols)
        Fitted (denoised) magnetic image at every height [s].
    residual : ndarray (H, rows, cols)
        Data minus model; NaN where the data were masked [s].
    noise_std : ndarray (H,)
        Per-pixel white-noise std of each height from the leverage-corrected residual [s].
    magnetic_rms, magnetic_rms_std : ndarray (H,)
        Noise-debiased rms of the magnetic image at each height and its standard error [s].
    residual_rms : ndarray (H,)
        Rms of the residual over valid pixels [s].
    expected_residual_rms : ndarray (H,)
        Rms the residual would have if it were pure noise of ``noise_std`` [s].
    inverse_weight_sum : ndarray (rows, cols//2+1)
        ``1 / sum_h w_h e_h^2``: Var(A(q)) = N * this (``grid="dct"``: Var(A(q)) itself, cells (rows, cols)).
    decay : ndarray (H, rows, cols//2+1)
        ``exp(-|q| (h - h_0))``.
    noise_power : ndarray (H,)
        Mean-square the fit noise adds to ``model`` at each height [s^2] (subtract it from the map's
        mean square to debias).
    heights_m : ndarray (H,)
    pixel_m : (float, float)
        Row and column spacing [m].
    """

    amplitude: np.ndarray
    model: np.ndarray
    residual: np.ndarray
    noise_std: np.ndarray
    magnetic_rms: np.ndarray
    magnetic_rms_std: np.ndarray
    residual_rms: np.ndarray
    expected_residual_rms: np.ndarray
    inverse_weight_sum: np.ndarray
    decay: np.ndarray
    noise_power: np.ndarray
    heights_m: np.ndarray
    pixel_m: tuple[float, float]
    window_mean: np.ndarray | None = None   # (H,) window mean of ``model`` (windowed fit only) [s]
    iterations: int = 0                     # conjugate-gradient iterations (windowed fit only)
    drift_px: np.ndarray | None = None      # (J, 2) drift refined with the field (windowed fit only) [px]
    grid: str = "rfft"                      # cells of amplitude/decay: "rfft" half plane or "dct" (orthonormal)
    unit_residual_rms: np.ndarray | None = None  # (H,) residual rms that white noise of unit variance at
    #                                              every height would leave with the fit's weights (dct fit)


def fit_continuation(stack: np.ndarray, *, heights_m, pixel_m, valid: np.ndarray | None = None,
                     stats_mask: np.ndarray | None = None, n_iter: int | None = None, tol: float = 1e-3,
                     max_weight_ratio: float = 10.0) -> ContinuationFit:
    """Fit one complex amplitude per spatial frequency jointly across heights (Laplace continuation).

    Weighted least squares per frequency with closed form
    ``A = sum_h w_h e_h M_h / sum_h w_h e_h^2``, ``w_h = 1/sigma_h^2``, ``e_h = exp(-|q|(h - h_0))``.
    The per-height noise sigma_h is re-estimated from the residuals by the method of moments (the expected
    residual power of every height is linear in all sigma_j^2 for the weights in use; for w = 1/sigma^2
    it reduces to ``E|r_h|^2 = N sigma_h^2 (1 - w_h e_h^2 / sum w e^2)``), iterated ``n_iter`` times. Masked pixels are
    filled with the current model (expectation-maximisation style) between iterations.

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
    q, _, cw = _wavenumbers((rows, cols), pixel_m)
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


def alias_axes_for(alias_axes, pixel_m, lowest_height_m: float) -> tuple[int, ...]:
    """Axes (0 = rows, 1 = columns) that get alias fields: ``"auto"`` picks those whose spacing exceeds 4 times
    the lowest height (rule of thumb, no source; see :func:`fit_continuation_windowed`); else the axes given."""
    if isinstance(alias_axes, str):
        if alias_axes != "auto":
            raise ValueError(f"alias_axes must be 'auto' or a sequence of 0 and 1, got {alias_axes!r}")
        return tuple(a for a, p in enumerate(pixel_pair_m(pixel_m)) if p > 4.0 * lowest_height_m)
    return tuple(int(a) for a in alias_axes)


def _alias_frequencies(fr, fc, pr, pc, axes):
    """True (row, column) frequencies [cycles/m] of the fundamental and of the aliases kept.

    A scan point-samples the field, so content at ``f + m / pixel`` lands on ``f`` (Shannon 1949, Proc.
    IRE 37, 10; from memory) and decays with its own, larger ``|q|``. Per aliased axis two partners are
    kept: the nearer ``f - sign(f)/pixel`` and the farther ``f + sign(f)/pixel``; both are even in ``f``,
    so each partner is a real field.
    """
    out = [(fr, fc)]
    if 0 in axes:
        s = np.sign(fr)
        out += [(fr - s / pr, fc + 0 * fr), (fr + s / pr, fc + 0 * fr)]
    if 1 in axes:
        s = np.sign(fc)
        out += [(fr + 0 * fc, fc - s / pc), (fr + 0 * fc, fc + s / pc)]
    return out


def _self_conjugate_real(ph, shape):
    """Keep only the real part of a multiplier at the cells of an rfft2 half plane that are their own
    conjugate (the real image cannot carry the imaginary part there)."""
    rows, cols = shape
    for r in {0, rows // 2} if rows % 2 == 0 else {0}:
        for c in {0, cols // 2} if cols % 2 == 0 else {0}:
            ph[..., r, c] = ph[..., r, c].real
    return ph


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


def fit_continuation_windowed(images: np.ndarray, *, heights_m, pixel_m, height_index=None, drift_px=None,
                              valid: np.ndarray | None = None, pad_px=None, ridge: float = 1e-4,
                              tol: float = 1e-4, max_iter: int = 200, n_reweight: int = 10,
                              max_weight_ratio: float = 10.0, refine_drift: bool = True,
                              alias_axes="auto", alias_ridge: float = 1e-3) -> ContinuationFit:
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
    ``|q|``. There two further fields (the nearer and the farther alias partner of every frequency, see
    :func:`_alias_frequencies`) join ``U``, each with its own decay, held by ``alias_ridge`` everywhere.
    ``alias_axes="auto"`` aliases an axis whose spacing exceeds 4 h_0 (a rule of thumb, no source: a
    simulated scan with 62.5 nm lines at 10 nm lift left a 1 deg misfit without row aliases; alias fields
    give the lowest heights freedom that also absorbs some real non-Laplace contrast there, so they are not
    used where the sampling does not call for them).

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

    Returns
    -------
    ContinuationFit
        ``model`` (H, rows, cols) in the reference frame, *including* its window mean (``window_mean``);
        ``residual`` (H, rows, cols) averaged over the images of each height (NaN where none is valid);
        ``noise_std`` the noise of the height's averaged image; ``amplitude``, ``decay``,
        ``inverse_weight_sum`` on the window grid (periodic approximation, for the resolution and the
        standard errors).
    """
    y = np.asarray(images, dtype=float)
    h = np.asarray(heights_m, dtype=float)
    nh = h.size
    nj, rows, cols = y.shape
    hi = np.arange(nj) if height_index is None else np.asarray(height_index, dtype=int)
    per_h = np.bincount(hi, minlength=nh).astype(float)
    ok = np.isfinite(y) if valid is None else (np.asarray(valid, bool) & np.isfinite(y))
    pr, pc = pixel_pair_m(pixel_m)
    axes = alias_axes_for(alias_axes, (pr, pc), h[0])
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
    freqs = _alias_frequencies(fr_big, fc_big, pr, pc, axes)
    nk = len(freqs)
    e_big = np.array([np.exp(-2.0 * np.pi * np.hypot(a, b)[None] * (h - h[0])[:, None, None]) for a, b in freqs])
    in_window = np.zeros(shape, bool)
    in_window[:rows, :cols] = True
    frac = rows * cols / (big_r * big_c)
    rr, cc = np.arange(rows)[:, None], np.arange(cols)[None, :]
    g = gc = ok = okf = n_ok = None

    def set_drift(dd):
        # operators for drift dd; the band a periodic shift would wrap in is left out, so data that were
        # shifted periodically (synthetic) and real scans are treated alike
        nonlocal g, gc, ok, okf, n_ok
        ph = [np.exp(-2j * np.pi * (a[None] * pr * dd[:, 0, None, None] + b[None] * pc * dd[:, 1, None, None]))
              for a, b in freqs]
        g = _self_conjugate_real(np.array([e_big[k][hi] * ph[k] for k in range(nk)]), shape)  # (K, J, R, Cq)
        gc = np.conj(g)
        lo = np.ceil(np.clip(dd, 0, None))
        up = np.ceil(np.clip(-dd, 0, None))
        inside = ((rr[None] >= lo[:, 0, None, None]) & (rr[None] < rows - up[:, 0, None, None])
                  & (cc[None] >= lo[:, 1, None, None]) & (cc[None] < cols - up[:, 1, None, None]))
        ok = ok_data & inside
        okf = ok.astype(float)
        n_ok = np.maximum(ok.sum(axis=(1, 2)), 1)

    set_drift(d)

    def centred(m):
        m = m * okf
        return (m - (np.einsum("jab->j", m) / n_ok)[:, None, None]) * okf

    def forward(x):
        spec = np.einsum("kab,kjab->jab", sp_fft.rfft2(x, axes=(-2, -1)), g)
        # only the window's rows and columns are needed: inverse along rows, crop, then along columns
        half = sp_fft.ifft(spec, axis=-2, overwrite_x=True)[:, :rows]
        return centred(sp_fft.irfft(half, n=big_c, axis=-1)[:, :, :cols])

    def adjoint(r_w):
        # the image is zero outside the window: transform its rows zero-padded, then its columns
        spec = sp_fft.fft(sp_fft.rfft(r_w, n=big_c, axis=-1), n=big_r, axis=-2, overwrite_x=True)
        return sp_fft.irfft2(np.einsum("kjab,jab->kab", gc, spec), s=shape, axes=(-2, -1))

    sigma2 = np.ones(nh)
    x = np.zeros((nk,) + shape)
    total_iter = 0
    q_win, _, cw = _wavenumbers((rows, cols), (pr, pc))
    fr_w = np.fft.fftfreq(rows)[:, None] / pr
    fc_w = np.fft.rfftfreq(cols)[None, :] / pc
    e_win = np.array([np.exp(-2.0 * np.pi * np.hypot(a, b)[None] * (h - h[0])[:, None, None])
                      for a, b in _alias_frequencies(fr_w, fc_w, pr, pc, axes)])
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

        def normal(v):
            return adjoint(wj[:, None, None] * forward(v)) + ridge_field * v

        def apply_precond(v):
            return sp_fft.irfft2(sp_fft.rfft2(v, axes=(-2, -1)) * precond, s=shape, axes=(-2, -1))

        yc = centred(y0)
        b = adjoint(wj[:, None, None] * yc)
        r = b - normal(x)
        z = apply_precond(r)
        p = z.copy()
        rz = float(np.vdot(r, z))
        b_norm = float(np.vdot(b, apply_precond(b)))
        for _ in range(int(max_iter)):
            if rz <= tol**2 * b_norm:
                break
            ap = normal(p)
            alpha = rz / float(np.vdot(p, ap))
            x += alpha * p
            r -= alpha * ap
            z = apply_precond(r)
            rz_new = float(np.vdot(r, z))
            p = z + (rz_new / rz) * p
            rz = rz_new
            total_iter += 1
        resid = yc - forward(x)
        r2 = np.bincount(hi, weights=(resid**2).sum(axis=(1, 2)), minlength=nh) / np.bincount(
            hi, weights=n_ok, minlength=nh)
        w_h = per_h / sigma2
        _, lev, _ = _window_statistics(e_win, cwv, w_h, n, [0.0] + [alias_ridge * float(w_h.mean())] * (nk - 1))
        lev_img = lev / np.maximum(per_h, 1.0)  # leverage of one image of the height
        new = r2 / np.clip(1.0 - lev_img, 1e-3, None)
        floor = np.median(new[new > 0]) / max_weight_ratio if np.any(new > 0) else 1e-300
        new = np.maximum(new, floor)
        settled = bool(np.all(np.abs(new - sigma2) <= 1e-2 * new))
        sigma2 = new
        if settled and round_ > 0 and last_step < 1e-3:
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
            x = sp_fft.irfft2(xf_now * _self_conjugate_real(np.array(shift0), shape), s=shape, axes=(-2, -1))
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
                           iterations=total_iter, drift_px=d)


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


def resolution_period_m(fit: ContinuationFit, *, snr: float = 1.0, significance: float = 3.0,
                        noise_std: np.ndarray | None = None) -> np.ndarray:
    """Shortest spatial period whose fitted magnetic contrast is still above the noise, per height [m].

    Radial bins of width 1 / (the longer side of the scan); a bin passes at height h if its noise-debiased fitted
    power exceeds ``snr`` times the measurement-noise power of that height in the same bin and is
    ``significance`` standard errors above zero. The period is 1 / (highest passing frequency); inf where
    no bin passes. ``noise_std`` (H,) overrides the per-pixel noise of one image at each height (default: the
    fitted ``fit.noise_std``). Common practice (signal-to-noise of one), no source.
    """
    sig_n = fit.noise_std if noise_std is None else np.asarray(noise_std, float)
    nh = fit.model.shape[0]
    rows, cols = fit.model.shape[-2:]
    n = rows * cols
    if fit.grid == "dct":  # orthonormal cells: white noise of variance s^2 has s^2 in every cell
        fr, fc = dct_frequencies((rows, cols), fit.pixel_m)
        fmag, cw, nu = np.hypot(fr, fc), np.ones((rows, cols)), 1.0
    else:
        _, fmag, cw = _wavenumbers((rows, cols), fit.pixel_m)
        nu = float(n)
    df = 1.0 / max(rows * fit.pixel_m[0], cols * fit.pixel_m[1])
    b = np.rint(fmag / df).astype(int).ravel()
    nb = b.max() + 1
    pred = fit.amplitude[None] * fit.decay
    v = nu * fit.decay**2 * fit.inverse_weight_sum[None]
    p2 = np.abs(pred) ** 2
    mu2 = np.clip(p2 - v, 0.0, None)
    out = np.full(nh, np.inf)
    cwf = cw.ravel()
    for i in range(nh):  # over heights; bins are vectorised
        sig = np.bincount(b, weights=cwf * (p2[i] - v[i]).ravel(), minlength=nb)
        var = np.bincount(b, weights=2.0 * cwf * (2.0 * mu2[i] * v[i] + v[i] ** 2).ravel(), minlength=nb)
        noise = np.bincount(b, weights=cwf * nu * sig_n[i] ** 2, minlength=nb)
        ok = (sig >= snr * noise) & (sig > significance * np.sqrt(var))
        ok[0] = False
        idx = np.nonzero(ok)[0]
        if idx.size:
            out[i] = 1.0 / (idx.max() * df)
    return out


@dataclass(frozen=True)
class MeanFit:
    """Electrostatic and short-range parts of the image mean (signal units s).

    Attributes
    ----------
    electrostatic, electrostatic_std : ndarray (H,) or (H, B)
    short_range, short_range_std : ndarray (H,)
    correlation : ndarray (H,)
        Correlation coefficient of the two parts at each height (bias grid: at the first bias).
    parameters, covariance : ndarray
        Heights only: (amplitude of the electrostatic shape, amplitude of the short-range shape).
        Bias grid: (V_cpd, a_1..a_H, c_1..c_H).
    separable : bool
        Whether the data separate the two parts (see the fitting functions).
    sentence : str
    cpd_v, cpd_std_v : float or None
        Bias grid only.
    reduced_chi2 : float
    """

    electrostatic: np.ndarray
    electrostatic_std: np.ndarray
    short_range: np.ndarray
    short_range_std: np.ndarray
    correlation: np.ndarray
    parameters: np.ndarray
    covariance: np.ndarray
    separable: bool
    sentence: str
    cpd_v: float | None
    cpd_std_v: float | None
    reduced_chi2: float


def fit_mean_heights(mean, mean_std, *, electrostatic_shape, short_range_shape, heights_m,
                     separation_tolerance: float = 0.2, attractive_sign: float = 1.0) -> MeanFit:
    """Fit the image mean per height as ``alpha * e(h) + beta * s(h)`` (weighted linear least squares).

    ``e`` is the amplitude-weighted ``1/2 C''`` of the tip (electrostatic, times (V - V_cpd)^2 = alpha) and
    ``s`` the amplitude-weighted Hamaker sphere gradient per unit Hamaker constant (beta = H), both in
    signal units per unit parameter. Both forces attract (Hudlet et al. 1998; Hamaker 1937), so
    ``alpha`` and ``beta`` are held to the sign ``attractive_sign`` (+1 for force gradients, -1 for phase):
    a part that would come out repulsive is held at zero (non-negative least squares) and the sentence says
    so. The covariance is scaled by the reduced chi-square when it exceeds 1 (Birge ratio); a part held at
    zero keeps the standard error of the free fit. The parts count as separable when each part's standard
    error at the lowest height is at most ``separation_tolerance`` times the total mean there.
    """
    y = np.asarray(mean, float)
    sd = np.asarray(mean_std, float)
    e = np.asarray(electrostatic_shape, float)
    s = np.asarray(short_range_shape, float)
    sign = 1.0 if attractive_sign >= 0 else -1.0
    # columns scaled to unit first value (conditioning) and to the attractive sign (non-negativity)
    scale = sign * np.array([1.0 / e[0], 1.0 / s[0]])
    x = np.stack([e, s], axis=1) * scale[None] / sd[:, None]
    yw = y / sd
    coef_free = np.linalg.lstsq(x, yw, rcond=None)[0]
    coef, _ = optimize.nnls(x, yw)
    held = coef <= 0.0
    dof = max(len(y) - 2, 1)
    red = float(np.sum((x @ coef - yw) ** 2)) / dof
    cov = np.linalg.inv(x.T @ x) * max(red, 1.0)
    if held.any() and not held.all():
        j = int(np.nonzero(~held)[0][0])  # the free part alone
        cov_j = max(red, 1.0) / float(x[:, j] @ x[:, j])
        cov = np.diag(np.diag(cov))
        cov[j, j] = cov_j
    params = coef * scale
    pcov = cov * np.outer(scale, scale)
    es = params[0] * e
    sr = params[1] * s
    es_sd = np.sqrt(pcov[0, 0]) * np.abs(e)
    sr_sd = np.sqrt(pcov[1, 1]) * np.abs(s)
    free_cov = np.linalg.inv(x.T @ x)
    corr_p = float(free_cov[0, 1] / np.sqrt(free_cov[0, 0] * free_cov[1, 1]))
    corr = np.full(len(y), corr_p)
    total = abs(es[0] + sr[0])
    worst = max(es_sd[0], sr_sd[0])
    separable = bool(worst <= separation_tolerance * total)
    h_nm = float(np.asarray(heights_m)[0]) * 1e9
    if separable:
        sentence = (f"The heights separate the electrostatic and short-range parts (correlation {corr_p:+.2f}; "
                    f"at {h_nm:.4g} nm each part is known to within {worst / max(total, 1e-300):.1%} of the mean).")
    else:
        sentence = (f"The heights alone cannot separate the electrostatic and short-range parts: their "
                    f"correlation is {corr_p:+.2f} and at {h_nm:.4g} nm the split is uncertain by "
                    f"{worst / max(total, 1e-300):.0%} of the mean; only their sum is reliable. Measure at three "
                    "or more tip biases to separate them.")
    names = ("electrostatic", "short-range")
    for k in np.nonzero(held & (coef_free < 0))[0]:
        sentence += f" The free fit made the {names[k]} part repulsive, which it cannot be: it is held at zero."
    return MeanFit(es, es_sd, sr, sr_sd, corr, params, pcov, separable, sentence, None, None, red)


def _vertex_chi2(v0, volts, y, w):
    d = (volts - v0) ** 2  # (B,)
    # per height closed-form 2x2 weighted least squares for (a_h, c_h)
    s00 = (w * d * d).sum(axis=1)
    s01 = (w * d).sum(axis=1)
    s11 = w.sum(axis=1)
    t0 = (w * d * y).sum(axis=1)
    t1 = (w * y).sum(axis=1)
    det = s00 * s11 - s01**2
    a = (s11 * t0 - s01 * t1) / det
    c = (s00 * t1 - s01 * t0) / det
    r = y - a[:, None] * d[None] - c[:, None]
    return float((w * r * r).sum()), a, c


def fit_mean_bias_grid(mean, mean_std, *, bias_v) -> MeanFit:
    """Fit the image mean at each height as ``a_h (V - V_cpd)^2 + c_h`` with one common vertex V_cpd.

    The electrostatic force gradient is ``1/2 C''(z) (V - V_cpd)^2`` (quadratic in bias, minimal at the
    contact potential; Hudlet et al. 1998, Eur. Phys. J. B 2, 5): the parabola separates it exactly, and the
    remainder ``c_h`` at V_cpd is the short-range (bias-independent) part. V_cpd is found by profiling the
    chi-square; the covariance of all parameters comes from the Jacobian, scaled by the reduced chi-square
    when above 1.

    Parameters
    ----------
    mean, mean_std : ndarray (H, B)
        Image mean and its standard error per height and bias [s].
    bias_v : array_like (B,)
        Tip biases [V], at least three distinct values.
    """
    y = np.asarray(mean, float)
    sd = np.asarray(mean_std, float)
    volts = np.asarray(bias_v, float)
    w = 1.0 / sd**2
    nh, nb = y.shape
    span = volts.max() - volts.min()
    grid = np.linspace(volts.min() - span, volts.max() + span, 401)
    chis = np.array([_vertex_chi2(g, volts, y, w)[0] for g in grid])  # 1-D scan of the single nonlinear parameter
    k = int(np.argmin(chis))
    lo, hi = grid[max(k - 1, 0)], grid[min(k + 1, len(grid) - 1)]
    res = optimize.minimize_scalar(lambda v: _vertex_chi2(v, volts, y, w)[0], bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-10 * max(span, 1e-12)})
    v0 = float(res.x)
    chi2, a, c = _vertex_chi2(v0, volts, y, w)
    d = (volts - v0) ** 2
    jac = np.zeros((nh, nb, 2 * nh + 1))
    jac[:, :, 0] = -2.0 * a[:, None] * (volts - v0)[None]
    idx = np.arange(nh)
    jac[idx, :, 1 + idx] = d[None]
    jac[idx, :, 1 + nh + idx] = 1.0
    jw = (jac * np.sqrt(w)[..., None]).reshape(nh * nb, -1)
    dof = max(nh * nb - (2 * nh + 1), 1)
    red = chi2 / dof
    cov = np.linalg.pinv(jw.T @ jw) * max(red, 1.0)
    es = a[:, None] * d[None]
    g_v0 = -2.0 * a[:, None] * (volts - v0)[None]
    var_es = (g_v0**2 * cov[0, 0] + d[None] ** 2 * cov[1 + idx, 1 + idx][:, None]
              + 2.0 * g_v0 * d[None] * cov[0, 1 + idx][:, None])
    es_sd = np.sqrt(np.clip(var_es, 0.0, None))
    sr_sd = np.sqrt(cov[1 + nh + idx, 1 + nh + idx])
    cov_ec = g_v0[:, 0] * cov[0, 1 + nh + idx] + d[0] * cov[1 + idx, 1 + nh + idx]
    corr = cov_ec / np.where(es_sd[:, 0] * sr_sd > 0, es_sd[:, 0] * sr_sd, 1.0)
    params = np.concatenate([[v0], a, c])
    cpd_sd = float(np.sqrt(cov[0, 0]))
    sentence = (f"The bias grid ({nb} biases) separates the electrostatic part: V_cpd = {v0:.4g} ± {cpd_sd:.2g} V; "
                "the remainder at V_cpd is short-range.")
    return MeanFit(es, es_sd, c, sr_sd, corr, params, cov, True, sentence, v0, cpd_sd, red)
