"""Fits of the image mean of every height: the electrostatic and the short-range part.

A magnetic film large compared with the scan has no magnetic mean, so the mean of each image is
electrostatic plus short-range. Heights only: a weighted linear fit of two shapes (amplitude-weighted
``1/2 C''(z)`` and the Hamaker sphere gradient, from :mod:`.image_mean_models`). Bias grid: a parabola in V
per height with a common vertex V_cpd. Signal units as in :mod:`.continuation`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["MeanFit", "fit_mean_heights", "fit_mean_bias_grid", "cpd_sentence", "plus_minus",
           "vertex_beyond", "vertex_beyond_sentence"]


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
        Bias grid only; None where the vertex lies beyond the reach of the biases.
    reduced_chi2 : float
    vertex_beyond_v : float or None
        Bias grid: the vertex the means prefer where it lies beyond the reach of the biases (then ``cpd_v`` is
        None), else None.
    extrapolation : tuple of ndarray or None
        With ``vertex_beyond_v``: how far the electrostatic (H, B) and short-range (H,) parts move between a
        vertex at the edge of the search and that vertex [s].
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
    vertex_beyond_v: float | None = None
    extrapolation: tuple | None = None


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
    from scipy.optimize import nnls  # here: scipy.optimize takes 0.2 s to load; the decomposition does not call this

    coef, _ = nnls(x, yw)
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


def _parabolas_at(trial_v: np.ndarray, volts: np.ndarray, y: np.ndarray, w: np.ndarray):
    """``a_h (V - v)^2 + c_h`` at every trial vertex v (G,), each height's a_h and c_h by weighted linear least
    squares (closed form, 2 x 2), for means y and weights w (H, B): the chi-square (G,), a and c (G, H)."""
    d = ((volts[None, :] - np.asarray(trial_v, float)[:, None]) ** 2)[:, None, :]  # (G, 1, B)
    s00, s01, s11 = (w * d * d).sum(-1), (w * d).sum(-1), w.sum(-1)
    t0, t1 = (w * d * y).sum(-1), (w * y).sum(-1)
    det = s00 * s11 - s01**2
    a = (s11 * t0 - s01 * t1) / det
    c = (s00 * t1 - s01 * t0) / det
    return (w * (y - a[..., None] * d - c[..., None]) ** 2).sum(axis=(-2, -1)), a, c


def _vertex_chi2(v0, volts, y, w):
    """:func:`_parabolas_at` one vertex: the chi-square, a (H,) and c (H,)."""
    chi2, a, c = _parabolas_at(np.array([v0], float), volts, y, w)
    return float(chi2[0]), a[0], c[0]


def _profile_chi2(trial_v: np.ndarray, volts: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """The chi-square of :func:`_parabolas_at` at every trial vertex (G,)."""
    return _parabolas_at(trial_v, volts, y, w)[0]


BEYOND_SPANS = 20.0  # how far the profile looks for a vertex outside the window [bias ranges either side]
_BEYOND_POINTS = 4001


def vertex_beyond(mean, sd, volts, vertex: float) -> float | None:
    """The vertex the means prefer when it lies outside the window the common-vertex fit searches (one bias range
    either side of the biases, where the fitted vertex then stops), else None: the profile of the chi-square over
    twenty bias ranges either side has a lower minimum than the fitted vertex (on its grid of 4001 points)."""
    volts = np.asarray(volts, float)
    span = float(volts.max() - volts.min())
    w = 1.0 / np.asarray(sd, float) ** 2
    grid = np.linspace(volts.min() - BEYOND_SPANS * span, volts.max() + BEYOND_SPANS * span, _BEYOND_POINTS)
    chis = _profile_chi2(grid, volts, mean, w)
    at_fit = float(_profile_chi2(np.array([vertex]), volts, mean, w)[0])
    best = int(np.nanargmin(chis))
    if chis[best] < at_fit - 1e-9 * max(at_fit, 1.0) and not volts.min() - span < grid[best] < volts.max() + span:
        return float(grid[best])
    return None


def vertex_beyond_sentence(beyond_v: float, bias_v) -> str:
    """What a vertex beyond the reach of the biases (:func:`vertex_beyond`) means for V_cpd."""
    volts = np.asarray(bias_v, float)
    side = "below" if beyond_v < volts.min() else "above"
    return (f"The image mean's parabolas put their vertex at {beyond_v:+.3g} V or further {side}, more than "
            f"the bias range ({volts.min():+.3g} to {volts.max():+.3g} V) outside it, where their fit is "
            "not trusted: V_cpd is not determined; measure at biases on both sides of it.")


def _window_vertex(volts, y, w) -> float:
    """The common vertex within one bias range either side of the biases (the chi-square scanned on a grid, then
    refined by a bounded search about its lowest point)."""
    span = volts.max() - volts.min()
    grid = np.linspace(volts.min() - span, volts.max() + span, 401)
    chis = _profile_chi2(grid, volts, y, w)  # 1-D scan of the single nonlinear parameter
    k = int(np.argmin(chis))
    return _refined(volts, y, w, grid[max(k - 1, 0)], grid[min(k + 1, len(grid) - 1)])


def _refined(volts, y, w, lo: float, hi: float) -> float:
    from scipy.optimize import minimize_scalar  # here, as nnls above

    span = volts.max() - volts.min()
    res = minimize_scalar(lambda v: _vertex_chi2(v, volts, y, w)[0], bounds=(lo, hi), method="bounded",
                          options={"xatol": 1e-10 * max(span, 1e-12)})
    return float(res.x)


def _curvature_significant(volts, y, w, v0: float, min_significance: float) -> bool:
    """Whether some height's curvature exceeds ``min_significance`` of its standard error from the noise (the
    Jacobian's covariance, unscaled): a vertex is only looked for beyond the window where the means bend."""
    nh = y.shape[0]
    _, a, _ = _vertex_chi2(v0, volts, y, w)
    jw = _weighted_jacobian(volts, w, v0, a)
    cov = np.linalg.pinv(jw.T @ jw)
    a_sd = np.sqrt(np.clip(np.diag(cov)[1:1 + nh], 0.0, None))
    return bool(np.any(np.abs(a) > min_significance * a_sd))


def _weighted_jacobian(volts, w, v0: float, a) -> np.ndarray:
    """d model / d (V_cpd, a_1..a_H, c_1..c_H) of ``a_h (V - V_cpd)^2 + c_h``, times sqrt(w), as (H B, 2H + 1)."""
    nh, nb = w.shape
    jac = np.zeros((nh, nb, 2 * nh + 1))
    jac[:, :, 0] = -2.0 * a[:, None] * (volts - v0)[None]
    idx = np.arange(nh)
    jac[idx, :, 1 + idx] = ((volts - v0) ** 2)[None]
    jac[idx, :, 1 + nh + idx] = 1.0
    return (jac * np.sqrt(w)[..., None]).reshape(nh * nb, -1)


def fit_mean_bias_grid(mean, mean_std, *, bias_v, look_beyond: bool = True,
                       min_significance: float = 3.0) -> MeanFit:
    """Fit the image mean at each height as ``a_h (V - V_cpd)^2 + c_h`` with one common vertex V_cpd.

    The electrostatic force gradient is ``1/2 C''(z) (V - V_cpd)^2`` (quadratic in bias, minimal at the
    contact potential; Hudlet et al. 1998, Eur. Phys. J. B 2, 5): the parabola separates it exactly, and the
    remainder ``c_h`` at V_cpd is the short-range (bias-independent) part. V_cpd is found by profiling the
    chi-square within one bias range either side of the biases; the covariance of all parameters comes from the
    Jacobian, scaled by the reduced chi-square when above 1.

    With ``look_beyond``, where some curvature is ``min_significance`` standard errors from zero (rule of thumb,
    no source) and the chi-square profile has a lower minimum beyond that window (:func:`vertex_beyond`), V_cpd
    is out of reach of the biases: the parabolas are fitted at the vertex the means prefer, but no V_cpd is
    reported (``cpd_v`` None, ``vertex_beyond_v`` that vertex), the parts count as not separable (they rest on
    extrapolating the parabolas) and ``extrapolation`` holds how far they move between the window's edge and that
    vertex, as model uncertainty.

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
    v0 = _window_vertex(volts, y, w)
    beyond = None
    if look_beyond and _curvature_significant(volts, y, w, v0, min_significance):
        beyond = vertex_beyond(y, sd, volts, v0)
    edge = v0
    if beyond is not None:  # the least-squares vertex, refined within a step of the profile's grid
        step = (2.0 * BEYOND_SPANS + 1.0) * float(volts.max() - volts.min()) / (_BEYOND_POINTS - 1)
        v0 = _refined(volts, y, w, beyond - step, beyond + step)
    chi2, a, c = _vertex_chi2(v0, volts, y, w)
    d = (volts - v0) ** 2
    idx = np.arange(nh)
    jw = _weighted_jacobian(volts, w, v0, a)
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
    if beyond is None:
        return MeanFit(es, es_sd, c, sr_sd, corr, params, cov, True, cpd_sentence(nb, v0, cpd_sd), v0, cpd_sd, red)
    _, a_e, c_e = _vertex_chi2(edge, volts, y, w)
    moved = (es - a_e[:, None] * ((volts - edge) ** 2)[None], c - c_e)
    sentence = vertex_beyond_sentence(v0, volts) + (
        f" The electrostatic and short-range parts then rest on extrapolating the parabolas to a vertex the biases "
        f"do not reach (not separable): only their sum, the measured non-magnetic mean, is reliable; how far the "
        f"split moves between a vertex one bias range beyond the biases ({edge:+.3g} V) and at {v0:+.3g} V counts "
        "as model uncertainty.")
    return MeanFit(es, es_sd, c, sr_sd, corr, params, cov, False, sentence, None, None, red, v0, moved)


def cpd_sentence(biases: int, cpd_v: float, cpd_std_v: float) -> str:
    """What a bias grid's parabolas give: V_cpd in millivolts, to the place of its standard error."""
    return (f"The bias grid ({biases} biases) separates the electrostatic part: V_cpd = "
            f"{plus_minus(1e3 * cpd_v, 1e3 * cpd_std_v)} mV; the remainder at V_cpd is short-range.")


def plus_minus(value: float, std: float) -> str:
    """``value ± std`` with the standard error to two significant digits and the value to the same place."""
    places = max(0, 1 - int(np.floor(np.log10(std)))) if std > 0 and np.isfinite(std) else 3
    return f"{value:.{places}f} ± {std:.{places}f}"
