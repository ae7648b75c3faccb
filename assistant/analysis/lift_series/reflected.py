"""Laplace continuation of a non-periodic scan with reflecting edges: one cosine amplitude per frequency.

A scan is a window onto an unbounded field, not one period of it. The periodic FFT fit sees the jump where
the image wraps round, which is broadband and decays with no height, so it misfits at every height. The
type-II discrete cosine transform instead expands the image in cosines that are even about each edge
(half a pixel outside the outer samples): it sees the scan reflected at its edges, continuous across the
seam (Strang 1999, SIAM Rev. 41, 135; from memory). Each of its basis functions
``cos(pi k (i + 1/2) / R) cos(pi l (j + 1/2) / C)`` is a real field whose continuation decays as
``exp(-|q| dz)`` with ``|q| = pi sqrt((k / (R p_r))^2 + (l / (C p_c))^2)`` (Laplace's equation; Hug et al.
1998, J. Appl. Phys. 83, 5609; Wallace 1951, Bell Syst. Tech. J. 30, 1145; from memory), so the closed
per-frequency least squares of the periodic fit carries over: one real amplitude per cell, weighted by the
noise of each height. The orthonormal transform keeps white noise white with the same variance per cell.

What the reflection gets wrong: the field outside the scan is not the mirror image of the field inside; the
two differ to first order by the normal derivative at the edge times the distance. The higher heights see
that difference through the continuation kernel (a Poisson kernel of width ``h - h_0``), so their images
misfit within a few kernel widths of the edges, and the joint fit passes a small part of that misfit on to
the lowest height. The noise of every height is therefore estimated from the residual in the interior
only. :func:`~.windowed.fit_continuation_windowed` treats the outside as missing data
and removes the misfit, at about three times the whole analysis's time.
"""

from __future__ import annotations

import numpy as np

from assistant.analysis.cosine import dctn, idctn
from assistant.errors import InputError

from .continuation import ContinuationFit
from .frequencies import alias_orders_for, dct_alias_frequencies, pixel_pair_m
from .standard_errors import interior_power_variance

__all__ = ["fit_continuation_reflected", "interior_cell_weights"]


def _solve_cells(e, w, f, ridge, out=None):
    """Weighted least squares per cell for K fields.

    ``e`` (K, H, Q) decays, ``w`` (H,) weights, ``f`` (H, Q) data cells, ``ridge`` (K,) penalties. Returns the
    amplitudes (K, Q), the prediction (H, Q), the hat matrix ``L_hj = w_j e_h^T S^-1 e_j`` in a compact form
    (K = 1: ``(e_h^2 / S, 1 / S)``, shapes (H, Q) and (Q,), and ``L_hj = w_j e_h e_j / S``; K > 1: the full
    (H, H, Q) array) and the fundamental's weights: ``A_0 = sum_h w_h g_h F_h`` with ``g`` (H, Q), returned as
    ``1 / S`` (Q,) for K = 1 (``g_h = e_h / S``). ``out``: two (H, Q) buffers for K = 1.
    """
    nk = e.shape[0]
    if nk == 1:
        e0 = e[0]
        inv = 1.0 / np.einsum("h,hq,hq->q", w, e0, e0)
        amp = (np.einsum("h,hq,hq->q", w, e0, f) * inv)[None]
        amp[:, 0] = 0.0
        # products into buffers reused across calls: the page faults of fresh multi-megabyte arrays took
        # as long as the arithmetic here
        e2i = np.multiply(e0, e0, out=out[0] if out else None)
        e2i *= inv[None]
        pred = np.multiply(e0, amp, out=out[1] if out else None)
        return amp, pred, (e2i, inv), inv
    s = np.einsum("h,khq,lhq->qkl", w, e, e) + np.diag(ridge)
    sinv = np.linalg.inv(s)
    amp = np.einsum("qkl,lhq,h,hq->kq", sinv, e, w, f)
    amp[:, 0] = 0.0
    hat = np.einsum("khq,qkl,ljq->hjq", e, sinv, e) * w[None, :, None]
    return amp, np.einsum("kq,khq->hq", amp, e), hat, np.einsum("qk,khq->hq", sinv[:, 0, :], e)


def _interior_cell_weights(shape, band):
    """How strongly each cosine cell shows in the interior: ``mean over the interior of basis^2 * n`` (Q,).

    The orthonormal basis function of cell (k, l) is ``c_k(i) c_l(j)`` with ``c_0 = sqrt(1/N)`` and
    ``c_k = sqrt(2/N) cos(pi k (i + 1/2) / N)``; its square averages to 1/n over the whole scan but not over
    an interior, where the longest cosines are weak (they peak at the edges). Weighting the cells by this
    makes the moment relations hold for the interior residual. Per axis, with ``t = 2 pi k / N``, the mean of
    ``2 cos^2`` over ``i = b .. N-b-1`` is ``1 - sin(t b) / (sin(t / 2) (N - 2 b))`` (sum of a cosine series).
    """
    factors = []
    for size in shape:
        t = 2.0 * np.pi * np.arange(1, size) / size
        f = np.ones(size)
        f[1:] = 1.0 - np.sin(t * band) / (np.sin(t / 2.0) * (size - 2 * band))
        factors.append(f)
    return np.multiply.outer(*factors).ravel()


interior_cell_weights = _interior_cell_weights


def _moment_matrix(w, hat, cell_w, n, work=None):
    """``M`` with ``E[mean interior residual power of height h] = sum_j M_hj sigma_j^2``, white noise, any weights.

    Per cell ``r_h = F_h - sum_j L_hj F_j``, so ``E r_h^2 = sigma_h^2 (1 - 2 L_hh) + sum_j L_hj^2 sigma_j^2``;
    averaged over the n cells weighted by their interior weight ``cell_w`` (Parseval, orthonormal transform).
    The DC cell carries no residual (the means are removed) and is left out. ``work``: an (H, Q) buffer.
    """
    nh = w.size
    cw = cell_w[1:]
    if isinstance(hat, tuple):
        e2i, _ = hat
        e2i = e2i[:, 1:]
        x = np.multiply(e2i, np.sqrt(cw)[None], out=None if work is None else work[:, 1:])
        m = np.einsum("hq,jq->hj", x, x) * (w * w)[None, :]
        diag_l = w * np.einsum("hq,q->h", e2i, cw)
    else:
        g = hat[..., 1:]
        m = np.einsum("hjq,hjq,q->hj", g, g, cw)
        diag_l = np.einsum("hhq,q->h", g, cw)
    m[np.diag_indices(nh)] += float(cw.sum()) - 2.0 * diag_l
    return m / n


def _leverage(w, hat, cell_w):
    """Diagonal of the moment matrix's leverage term, ``sum_q cw L_hh`` per height (see :func:`_moment_matrix`)."""
    cw = cell_w[1:]
    if isinstance(hat, tuple):
        return w * np.einsum("hq,q->h", hat[0][:, 1:], cw)
    return np.einsum("hhq,q->h", hat[..., 1:], cw)


def _noise_from_moments(m, r2):
    """Noise variance of every height from the interior residual powers ``r2`` and ``E r2 = M sigma^2``.

    Solving ``M sigma^2 = r2`` outright is ill-conditioned where the heights share most of their residual
    (with alias fields on a simulated series of seven heights it alternated between heights at 2-4x the
    noise and heights at the floor). Instead: every height's noise as if all were alike, ``r2_h / sum_j M_hj``,
    then, where the height's own noise makes at least half of its expected residual, one step that takes the
    others' share out, ``(r2_h - sum_{j != h} M_hj s_j^2) / M_hh``, blended in smoothly as that share grows from
    40 to 60 %. The lowest height, whose residual is mostly the other heights' noise continued down, keeps the
    first estimate.
    """
    alike = r2 / np.maximum(m.sum(axis=1), 1e-30)
    own = np.diag(m) * alike
    cross = m @ alike - own
    refined = np.maximum((r2 - cross) / np.maximum(np.diag(m), 1e-30), 0.0)
    # blended, not switched, by the share of the height's own noise (from 40 % to 60 %): a switch made the
    # estimate jump with the noise draw
    share = own / np.maximum(own + cross, 1e-300)
    t = np.clip((share - 0.4) / 0.2, 0.0, 1.0)
    return alike + t * (refined - alike)


def _variances(w, sigma2, hat, g0, work=None):
    """Per cell: the variance of the fitted model of every height (H, Q), ``sum_j L_hj^2 sigma_j^2``, and of
    the fundamental's amplitude (Q,), ``sum_h (w_h g_h)^2 sigma_h^2``, for white noise of ``sigma2``."""
    ws = w * w * sigma2
    if isinstance(hat, tuple):
        e2i, inv = hat  # L_hj^2 = w_j^2 e_h^2 e_j^2 / S^2 = e2i_h e2i_j w_j^2
        s_q = np.einsum("j,jq->q", ws, e2i)
        return np.multiply(e2i, s_q[None], out=work), s_q * g0
    return np.einsum("hjq,hjq,j->hq", hat, hat, sigma2), np.einsum("h,hq,hq->q", ws, g0, g0)


def fit_continuation_reflected(stack: np.ndarray, *, heights_m, pixel_m, valid: np.ndarray | None = None,
                             interior_px: int = 0, alias_axes="auto", alias_ridge: float = 1e-4,
                             max_weight_ratio: float = 10.0, n_fill: int = 8,
                             noise_std: np.ndarray | None = None, noise_known: bool = False,
                             noise_dof=None, rms_std: bool = True, weight_std=None) -> ContinuationFit:
    """Joint Laplace continuation of an aligned stack in the cosine basis of its reflected scan.

    One closed-form pass per spatial frequency, and the noise of every height estimated from the interior
    residual by the method of moments (see :func:`_noise_from_moments`). Weights: equal, or ``1 / sigma_h^2``
    from an earlier estimate ``noise_std``, so that a height whose residual shows more than noise (a noisier
    pass, contrast that does not continue) weighs less and cannot pull the others. With equal weights the
    lowest height's estimate is mostly the other heights' noise continued down, so the weights are iterated:
    :func:`~.reflected_drift.fit_with_drift_reflected` weighs every fit after its first by the
    noise the one before found. Masked pixels are filled with the model and refitted
    (expectation-maximisation), up to ``n_fill`` times.

    Parameters
    ----------
    stack : ndarray (H, rows, cols)
        Aligned images [s] (signal units of the caller); their means are removed (the DC cell is not fitted).
    heights_m : array_like (H,)
        Lift heights [m], increasing.
    pixel_m : float or (float, float)
        Pixel spacing [m], one value or (row spacing, column spacing).
    valid : ndarray of bool (H, rows, cols), optional
        False where data are missing (NaN pixels always are).
    interior_px : int
        Width of the edge band left out of the noise estimate and of ``residual_rms`` [px].
    alias_axes : "auto" or sequence of {0, 1}
        Axes with alias fields (see :func:`~.frequencies.alias_axes_for`; their orders
        :func:`~.frequencies.alias_orders_for`).
    alias_ridge : float
        Penalty on the alias fields relative to the mean weight. On two simulated series with 75 and 125 nm
        between lines at 10 nm lowest lift, 1e-3 held the alias fields too tightly (residuals 1.2-1.6x what
        noise leaves at 15-50 nm); 1e-4 left them at 0.85-1.1x, and 1e-5 changed little more.
    max_weight_ratio : float
        Floor of a height's noise variance relative to the median one (a moment estimate can come out
        zero or negative where the model misfits).
    n_fill : int
        Largest number of fill-and-refit rounds with masked pixels.
    noise_std : ndarray (H,), optional
        Noise of every height from an earlier fit, for the weights ``1 / noise_std^2``; default equal.
    noise_known : bool
        ``noise_std`` is the noise itself, measured independently of this fit (for example by
        :func:`~assistant.analysis.lift_series.image_noise.band_noise_variance`): it is used for the statistics as well
        and the moment estimate is skipped; masked pixels are then filled and refitted exactly ``n_fill``
        times, so the result is a smooth function of the data.
    noise_dof : float, optional
        Degrees of freedom behind the noise variance, one estimate for all heights (``Cov(sigma_h^2, sigma_j^2)
        = sigma_h^2 sigma_j^2 / noise_dof``): the uncertainty of the debiasing then enters ``magnetic_rms_std``.
    weight_std : ndarray (H,), optional
        With ``noise_known``: weigh the heights by ``1 / weight_std^2`` instead of ``1 / noise_std^2`` (for
        example a noise estimate shrunk towards the series' common level); the statistics keep ``noise_std``.
    rms_std : bool
        Compute ``magnetic_rms_std`` (one more transform of the stack); NaN otherwise, for fits whose
        statistics are not reported (the drift rounds before the last).

    Returns
    -------
    ContinuationFit
        With ``grid="dct"``: ``amplitude`` (rows, cols) and ``decay`` (H, rows, cols) are the fundamental's
        DCT cells; ``residual`` NaN where masked; ``residual_rms`` and ``expected_residual_rms`` over the
        interior.
    """
    data = np.asarray(stack, dtype=float)
    h = np.asarray(heights_m, dtype=float)
    nh, rows, cols = data.shape
    n = rows * cols
    pr, pc = pixel_pair_m(pixel_m)
    orders = alias_orders_for(alias_axes, (pr, pc), h[0], nh)
    ok = np.isfinite(data) if valid is None else (np.asarray(valid, bool) & np.isfinite(data))
    complete = bool(ok.all())
    b = int(max(min(interior_px, min(rows, cols) // 4), 0))
    if complete:
        stats = None
        n_stats = np.full(nh, (rows - 2 * b) * (cols - 2 * b))
        means = data.mean(axis=(1, 2))
        work = data  # the orthonormal DCT takes the mean into its DC cell alone, which is not fitted
    else:
        stats = ok.copy()
        stats[:, :b] = stats[:, rows - b:] = stats[:, :, :b] = stats[:, :, cols - b:] = False
        n_stats = np.maximum(stats.sum(axis=(1, 2)), 1)
        means = np.where(ok, data, 0.0).sum(axis=(1, 2)) / np.maximum(ok.sum(axis=(1, 2)), 1)
        work = np.where(ok, data, means[:, None, None])

    fields = dct_alias_frequencies((rows, cols), (pr, pc), orders)
    nk = len(fields)
    # per-cell arrays and transforms in single precision: this fit is memory-bound, and half the traffic
    # cut its time by a third. Against double precision on synthetic series the noise, residual and
    # magnetic-rms statistics moved by at most 2e-4 (relative) and the model by 0.2 % of the noise.
    e = np.empty((nk, nh, n), dtype=np.float32)  # decay of every field to every height
    for k, (a, c) in enumerate(fields):
        np.multiply.outer(-2.0 * np.pi * (h - h[0]), np.hypot(a, c).ravel(), out=e[k])
        np.exp(e[k], out=e[k])
    buffers = tuple(np.empty((nh, n), np.float32) for _ in range(3)) if nk == 1 else None
    spare = buffers[2] if buffers else None
    cell_w = _interior_cell_weights((rows, cols), b).astype(np.float32)
    resid = np.empty((nh, rows, cols), np.float32)

    def transform(x):
        cells = dctn(x.astype(np.float32)).reshape(nh, n)
        cells[:, 0] = 0.0
        return cells

    def inverse(cells):
        return idctn(cells.reshape(nh, rows, cols))

    def fit(f, w):
        ridge = np.array([0.0] + [alias_ridge * float(w.mean())] * (nk - 1), dtype=np.float32)
        return _solve_cells(e, w.astype(np.float32), f, ridge, buffers)

    f = transform(work)
    if noise_known and noise_std is None:
        raise InputError("noise_known needs noise_std")
    if noise_std is None:
        w = np.ones(nh)
    else:
        s2 = np.asarray(noise_std, dtype=float) ** 2
        if s2.shape != (nh,) or not np.all(s2 > 0):
            raise InputError(f"noise_std must be {nh} values > 0, got {noise_std!r}")
        w = 1.0 / s2 if weight_std is None else 1.0 / np.asarray(weight_std, dtype=float) ** 2
    rounds = 1 if complete else max(int(n_fill), 1)
    sigma2 = np.ones(nh)
    for round_ in range(rounds):
        amp, pred, hat, g0 = fit(f, w)
        # the residual in real space: the reflection's misfit sits along the edges, which the interior leaves
        # out (estimated from the cells instead, sum_q cell_w r_q^2 / n, the misfit of a synthetic crop
        # made the lowest height's noise come out 5x too large)
        model = inverse(pred)
        np.subtract(work, model, out=resid)
        resid -= means[:, None, None]
        rs = resid[:, b:rows - b, b:cols - b] if complete else np.where(stats, resid, 0.0)
        r2 = np.einsum("hij,hij->h", rs, rs) / n_stats
        m = _moment_matrix(w, hat, cell_w, n, spare)
        if noise_known:
            new, settled = s2, False
        else:
            sol = _noise_from_moments(m, r2)
            # floor: a misfit can drive one height's moment estimate to zero or below
            pos = sol[sol > 0]
            floor = np.median(pos) / max_weight_ratio if pos.size else 1e-12 * max(float(r2.max()), 1e-300)
            new = np.maximum(sol, floor)
            settled = round_ > 0 and bool(np.all(np.abs(new - sigma2) <= 1e-2 * new))
        sigma2 = new
        if settled or round_ == rounds - 1:
            break
        # masked pixels: fill with the model and refit (expectation-maximisation)
        work = np.where(ok, data, model + means[:, None, None])
        f = transform(work)

    if not complete:
        resid = np.where(ok, resid, np.nan)
    residual_rms = np.sqrt(r2)
    # what pure noise of sigma2 would leave with the weights of the final pass
    expected = np.sqrt(np.clip(m @ sigma2, 0.0, None))

    # noise-debiased power of the fitted map: each model cell ~ N(mu, v)
    jac = _moment_matrix(w, hat, cell_w, n, spare)  # off the diagonal: d(noise power of h) / d sigma_j^2
    jac[np.diag_indices(nh)] -= (float(cell_w[1:].sum()) - 2.0 * _leverage(w, hat, cell_w)) / n
    v, var_amp = _variances(w, sigma2, hat, g0, spare)
    v[:, 0] = 0.0  # the DC cell is not fitted
    # over the interior, like the residual: the noise part from the cells (its covariance is diagonal
    # there), the map's own power from the map
    noise_power = np.einsum("hq,q->h", v, cell_w) / n
    core = model[:, b:rows - b, b:cols - b]
    power = np.var(core, axis=(1, 2)) - noise_power
    # first-order variance over the interior (standard_errors); with a measured noise, its own uncertainty too
    # one noise level for the series: the estimates of all heights move together
    var_noise = None if noise_dof is None else np.outer(sigma2, sigma2) / np.asarray(noise_dof, float)
    var_power = (interior_power_variance(model, v, cell_w, b, noise_power_jacobian=jac, noise_variance_var=var_noise)
                 if rms_std else np.full(nh, np.nan))
    rms = np.sqrt(np.clip(power, 0.0, None))
    rms_std = np.where(rms > 0, np.sqrt(var_power) / (2.0 * np.where(rms > 0, rms, 1.0)), var_power**0.25)
    return ContinuationFit(amplitude=amp[0].reshape(rows, cols), model=model, residual=resid,
                           noise_std=np.sqrt(sigma2), magnetic_rms=rms, magnetic_rms_std=rms_std,
                           residual_rms=residual_rms, expected_residual_rms=expected,
                           inverse_weight_sum=var_amp.reshape(rows, cols), decay=e[0].reshape(nh, rows, cols),
                           noise_power=noise_power, heights_m=h, pixel_m=(pr, pc), grid="dct",
                           unit_residual_rms=np.sqrt(np.clip(m.sum(axis=1), 0.0, None)))
