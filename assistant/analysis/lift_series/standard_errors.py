"""Standard errors of a lift-series decomposition that hold over repeats with fresh noise.

Each function propagates white measurement noise to first order through a fit whose weights are fixed
(weighted linear least squares per spatial frequency; Bevington & Robinson 2003, Data Reduction and Error
Analysis, ch. 7-8; from memory) and keeps the terms that the simpler per-cell formulas left out: the interior
over which a statistic is taken (it mixes the cells of the cosine basis), the uncertainty of the noise estimate
used to debias a power, and the leverage of an image on the model it is registered against.
"""

from __future__ import annotations

import numpy as np

from assistant.analysis.cosine import dctn

__all__ = ["interior_power_variance", "drift_covariance"]


def interior_power_variance(model: np.ndarray, cell_variance: np.ndarray, cell_weight: np.ndarray, band: int, *,
                            noise_power_jacobian: np.ndarray | None = None,
                            noise_variance_var: np.ndarray | None = None) -> np.ndarray:
    """Variance of the noise-debiased power of fitted maps over their interior, per height.

    The power is ``P_h = var_I(m_h + e_h) - N_h(sigma^2)``: the variance over the interior ``I`` (``band``
    pixels from every edge) of the fitted map, whose noise ``e_h`` has independent cells of variance
    ``v_hq`` in the orthonormal cosine basis, less the noise power ``N_h`` computed from the noise estimates.
    To first order in the noise (``P`` the interior mask, ``D`` the orthonormal DCT, ``N_I`` interior pixels)::

        Var P_h = 4 / N_I^2 sum_q v_hq (D P (m_h - mean_I m_h))_q^2       (signal x noise)
                + 2 / (N_I n) sum_q v_hq^2 w_q                            (noise x noise)
                + sum_j (dN_h / d sigma_j^2)^2 Var(sigma_j^2)            (the debiasing noise estimate)

    where ``w_q`` is the cell's interior weight (mean over the interior of its basis function squared, times
    n). The first sum uses the fitted map for the true one; its own noise adds ``2 / (N_I n) sum v^2 w`` on
    average, which is taken off. The second is the diagonal approximation of ``2 tr((P C)^2) / N_I^2``
    (exact for white noise; close where ``v`` varies slowly from cell to cell).

    Parameters
    ----------
    model : ndarray (H, rows, cols)
        Fitted maps.
    cell_variance : ndarray (H, rows * cols)
        Variance of every orthonormal DCT cell of each map's noise.
    cell_weight : ndarray (rows * cols,)
        Interior weight of every cell.
    band : int
        Edge band [px].
    noise_power_jacobian : ndarray (H, H), optional
        ``dN_h / d sigma_j^2``.
    noise_variance_var : ndarray (H,) or (H, H), optional
        Variance of every height's noise-variance estimate, or their covariance (one estimate for all heights).

    Returns
    -------
    ndarray (H,)
    """
    nh, rows, cols = model.shape
    n = rows * cols
    b = int(band)
    core = model[:, b:rows - b, b:cols - b]
    n_i = core[0].size
    masked = np.zeros(model.shape, dtype=np.float32)
    masked[:, b:rows - b, b:cols - b] = core - core.mean(axis=(1, 2), keepdims=True)
    cells = dctn(masked).reshape(nh, n)
    v = np.asarray(cell_variance)
    cells *= cells
    cross = 4.0 * np.einsum("hq,hq->h", v, cells, dtype=np.float64) / n_i**2
    vv = np.einsum("hq,hq,q->h", v, v, cell_weight, dtype=np.float64) / (n_i * n)
    out = np.maximum(cross - 4.0 * vv, 0.0) + 2.0 * vv
    if noise_power_jacobian is not None and noise_variance_var is not None:
        jac, var = np.asarray(noise_power_jacobian), np.asarray(noise_variance_var, float)
        out = out + (jac**2 @ var if var.ndim == 1 else np.einsum("hj,jk,hk->h", jac, var, jac))
    return out


def drift_covariance(model: np.ndarray, decay: np.ndarray, image_weight: np.ndarray, height_index: np.ndarray,
                     band: int) -> np.ndarray:
    """Covariance of the drifts of a series registered against its own continuation (cosine basis) [px^2].

    The estimator (:func:`~.reflected_drift.fit_with_drift_reflected`): every image's
    Gauss-Newton step ``c_i = D_i^-1 J_i^T r_i`` against the model of its height over the interior (``J_i``
    the model's central-difference gradient there, ``D_i = J_i^T J_i``, ``r_i`` the residual), less the
    first image's step, is added to its drift until the steps settle; at the end every image's step equals
    the first one's, ``c_i = c`` (a common offset the model absorbs). The model is the weighted fit of all
    images and follows each by its leverage, ``L_ij = w_j e_i e_j / S`` in every cosine cell q (``e_iq`` the
    decay to image i's height, ``w_i`` its weight, ``S_q = sum_i w_i e_iq^2``). To first order in the noise,
    per axis, with ``X_i = DCT(J_i)`` (the interior gradient, zero outside) and ``Y_j = DCT(T_j)`` (the gradient
    over the whole scan, by which a shift of image j changes it)::

        J_i^T r_i = N_i + sum_j G_ij d_j
        G_ij = delta_ij <J_i, T_i> - w_j sum_q X_iq e_iq e_jq Y_jq / S_q
        Cov(N_i, N_j) = delta_ij sigma_i^2 <J_i, J_i> - sum_q X_iq X_jq e_iq e_jq / S_q

    (the residual covariance per cell is ``sigma_i^2 delta_ij - e_i e_j / S``). The equations
    ``N + G d - c D = 0`` for every image, with ``d_0 = 0``, give ``(d_1.., c) = -M^-1 N`` with
    ``M = [G[:, 1:], -D]`` and ``Cov = M^-1 Cov(N) M^-T``. The gradients are those of the fitted model (so
    conditional on the noise it carries), and the two axes are treated as uncorrelated.

    Parameters
    ----------
    model : ndarray (H, rows, cols)
        Fitted maps of every height.
    decay : ndarray (H, rows, cols)
        Decay of every cosine cell to every height.
    image_weight : ndarray (J,)
        ``1 / sigma^2`` of every image (not averaged over biases).
    height_index : ndarray of int (J,)
        Height of every image.
    band : int
        Edge band left out of the registration [px].

    Returns
    -------
    ndarray (2, J, J)
        Covariance between the drifts of all images along rows (``[0]``) and columns (``[1]``); zero for
        image 0, the frame.
    """
    m = np.asarray(model, dtype=np.float32)
    nh, rows, cols = m.shape
    b = int(band)
    hi = np.asarray(height_index, int)
    wi = np.asarray(image_weight, float)
    nj = hi.size
    out = np.zeros((2, nj, nj))
    if nj < 2:
        return out
    e = np.asarray(decay, dtype=np.float64).reshape(nh, -1)
    s = np.einsum("j,jq,jq->q", wi, e[hi], e[hi])
    inv_s = np.where(s > 0, 1.0 / np.where(s > 0, s, 1.0), 0.0)
    for axis in (0, 1):
        full = np.gradient(m, axis=axis + 1)
        inner = np.zeros_like(full)
        core = full[:, b:rows - b, b:cols - b]
        inner[:, b:rows - b, b:cols - b] = core - core.mean(axis=(1, 2), keepdims=True)
        jj = np.einsum("hij,hij->h", inner, inner, dtype=np.float64)      # <J, J> per height
        jt = np.einsum("hij,hij->h", inner, full, dtype=np.float64)       # <J, T>
        x = dctn(inner).reshape(nh, -1).astype(np.float64)
        y = dctn(full).reshape(nh, -1).astype(np.float64)
        xe = x[hi] * e[hi]                                                # (J, Q)
        ye = y[hi] * e[hi]
        g = -np.einsum("iq,jq,q->ij", xe, ye, inv_s) * wi[None, :]
        g[np.diag_indices(nj)] += jt[hi]
        cov_n = -np.einsum("iq,jq,q->ij", xe, xe, inv_s)
        cov_n[np.diag_indices(nj)] += jj[hi] / wi
        mmat = np.concatenate([g[:, 1:], -jj[hi][:, None]], axis=1)
        try:
            minv = np.linalg.inv(mmat)
        except np.linalg.LinAlgError:
            continue
        out[axis, 1:, 1:] = (minv @ cov_n @ minv.T)[:-1, :-1]
    return out
