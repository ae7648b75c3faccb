"""The switching-field distribution: a normal law fitted to the element-resolved switching intervals, the
loop it implies, and the interaction-corrected spread from a recoil branch.

* Counting: every element is known to have switched inside one field step (or not by the branch's end). The
  normal law is fitted by maximum likelihood to those intervals (interval censoring: each element contributes
  Phi((b - mu)/sigma) - Phi((a - mu)/sigma)), so the step width is accounted for exactly, whatever the steps.
  The maximum is found by a simplex search (``solvers.nelder_mead``); standard errors from the inverse of the
  numerical Hessian of the log-likelihood (textbook).
* Loop: non-interacting elements with normally distributed switching fields N(Hc, sigma^2), each reversing
  when the field along its reversal direction reaches its own switching field (Stoner-Wohlfarth switching of
  each element, textbook; from memory), give on the descending branch from positive saturation
  M/Ms = 1 - 2 Phi(-(H + Hc)/sigma), and on the ascending branch from negative saturation
  M/Ms = 2 Phi((H - Hc)/sigma) - 1; fitted by least squares (``solvers.levenberg_marquardt``).
* Sheppard's correction for grouping (Sheppard 1898, Proc. London Math. Soc. 29, 353; from memory): the
  variance of values rounded to a grid of width w exceeds the true variance by w^2/12. A cross-check.
* Interaction-corrected spread: the Delta-H(M, Delta-M) method of Tagawa et al. 1991 (IEEE Trans. Magn. 27,
  4975; from memory) compares, at equal magnetisation M, the field on the major ascending branch with the field
  on a recoil curve that starts from a partly reversed state M_r; a mean interaction field alpha M then cancels.
  For a normal intrinsic distribution, with elements switched back on the recoil when H + alpha M reaches their
  switching field, the mean-field model gives (derived here)
      Delta-H = H_major(M) - H_recoil(M) = sigma [Phi^-1((1 + M)/2) - Phi^-1((M - M_r)/2)],
  so sigma follows from a straight-line fit through the origin. Delta-M here is 1 - M_r, the magnetisation
  reversed before the recoil.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr, ndtri

from assistant.analysis.field_series.solvers import levenberg_marquardt, nelder_mead

MIN_INTERVALS = 3  # occupied field steps needed to resolve a spread
_MIN_SIGMA_FRACTION = 1e-3  # of the median step: the likelihood of a spread far below the step width is flat


@dataclass(frozen=True)
class NormalFit:
    """A normal law fitted to switching intervals [A/m]; ``sigma`` NaN when the elements switched within fewer
    than ``MIN_INTERVALS`` field steps (the spread is then not resolved by the steps)."""

    mean: float
    mean_std: float
    sigma: float
    sigma_std: float
    elements: int  # elements in the fit (switched or censored)
    switched: int
    intervals: int  # distinct intervals that hold a switch


def _nll(params: np.ndarray, low: np.ndarray, high: np.ndarray) -> float:
    mu, log_sigma = params
    sigma = math.exp(log_sigma)
    p = ndtr((high - mu) / sigma) - ndtr((low - mu) / sigma)
    return -float(np.sum(np.log(np.maximum(p, 1e-300))))


def _hessian(f, x: np.ndarray, steps: np.ndarray) -> np.ndarray:
    n = x.size
    h = np.zeros((n, n))
    for i in range(n):
        for j in range(n):
            ei, ej = np.eye(n)[i] * steps[i], np.eye(n)[j] * steps[j]
            h[i, j] = (f(x + ei + ej) - f(x + ei - ej) - f(x - ei + ej) + f(x - ei - ej)) / (4 * steps[i] * steps[j])
    return h


def fit_intervals(low: np.ndarray, high: np.ndarray) -> NormalFit | None:
    """Maximum-likelihood normal law for values known only to lie in ``[low, high)`` (``high`` inf: censored).

    Returns None without any switched element.
    """
    low, high = np.asarray(low, dtype=float), np.asarray(high, dtype=float)
    ok = np.isfinite(low)
    low, high = low[ok], high[ok]
    done = np.isfinite(high)
    if not done.any():
        return None
    widths = high[done] - low[done]
    step = float(np.median(widths)) if widths.size else 1.0
    mid = 0.5 * (low[done] + high[done])
    distinct = int(np.unique(np.round(np.c_[low[done], high[done]], 6), axis=0).shape[0])
    if distinct < MIN_INTERVALS:
        # Switching in one or two steps: the likelihood keeps rising as sigma shrinks below the step (two
        # neighbouring intervals are matched exactly by a step-function law on their common edge), so the
        # spread is not resolved; the mean is that of the interval midpoints.
        spread = float(np.var(mid)) + step**2 / 12.0
        return NormalFit(float(np.mean(mid)), math.sqrt(spread / max(done.sum(), 1)), math.nan, math.nan,
                         int(ok.sum()), int(done.sum()), distinct)
    sigma0 = max(float(np.std(mid)), 0.3 * step)
    floor = math.log(_MIN_SIGMA_FRACTION * step)
    best = nelder_mead(lambda p: _nll(np.array([p[0], max(p[1], floor)]), low, high),
                       np.array([float(np.mean(mid)), math.log(sigma0)]), xatol=1e-6 * step, fatol=1e-9, maxiter=2000)
    mu, log_sigma = float(best[0]), max(float(best[1]), floor)
    sigma = math.exp(log_sigma)
    hess = _hessian(lambda p: _nll(p, low, high), np.array([mu, log_sigma]), np.array([0.05 * sigma, 0.05]))
    try:
        cov = np.linalg.inv(hess)
        mean_std = math.sqrt(max(cov[0, 0], 0.0))
        sigma_std = sigma * math.sqrt(max(cov[1, 1], 0.0))
    except np.linalg.LinAlgError:
        mean_std = sigma_std = math.nan
    return NormalFit(mu, mean_std, sigma, sigma_std, int(ok.sum()), int(done.sum()), distinct)


def normal_loop(field_a_per_m: np.ndarray, coercive_a_per_m: float, sigma_a_per_m: float, *,
                direction: int = -1) -> np.ndarray:
    """M/Ms of non-interacting elements with N(Hc, sigma^2) switching fields: the descending branch from
    positive saturation (``direction`` -1) or the ascending branch from negative saturation (+1)."""
    h = np.asarray(field_a_per_m, dtype=float)
    if direction < 0:
        return 1.0 - 2.0 * ndtr(-(h + coercive_a_per_m) / sigma_a_per_m)
    return 2.0 * ndtr((h - coercive_a_per_m) / sigma_a_per_m) - 1.0


@dataclass(frozen=True)
class LoopFit:
    """Hc and sigma [A/m] from a least-squares fit of :func:`normal_loop` to one branch of a loop."""

    coercive: float
    coercive_std: float
    sigma: float
    sigma_std: float


def _normal_loop_jacobian(h: np.ndarray, coercive: float, sigma: float, direction: int) -> np.ndarray:
    """Derivatives of :func:`normal_loop` by Hc and by sigma, (fields, 2): with z the argument of Phi,
    d/dHc = -direction 2 phi(z) / sigma and d/dsigma = -direction 2 phi(z) z / sigma."""
    z = -(h + coercive) / sigma if direction < 0 else (h - coercive) / sigma
    slope = -direction * 2.0 * np.exp(-0.5 * z * z) / (math.sqrt(2.0 * math.pi) * sigma)
    return np.column_stack([slope, slope * z])


def fit_loop(field_a_per_m: np.ndarray, m_over_ms: np.ndarray, *, direction: int) -> LoopFit | None:
    """Fit :func:`normal_loop` to a branch (least squares; None when the branch never crosses zero)."""
    h, m = np.asarray(field_a_per_m, dtype=float), np.asarray(m_over_ms, dtype=float)
    ok = np.isfinite(h) & np.isfinite(m)
    h, m = h[ok], m[ok]
    if h.size < 3 or m.min() > 0 or m.max() < 0:
        return None
    order = np.argsort(h)  # both branches rise with the field
    hc0 = abs(float(np.interp(0.0, np.maximum.accumulate(m[order]), h[order])))
    span = float(np.ptp(h)) or 1.0
    spread = lambda p: abs(p[1]) + 1e-9 * span  # noqa: E731  (any sign of the parameter is a spread)
    x, resid, jac = levenberg_marquardt(
        lambda p: normal_loop(h, p[0], spread(p), direction=direction) - m,
        lambda p: _normal_loop_jacobian(h, p[0], spread(p), direction) * np.array([1.0, np.sign(p[1])]),
        np.array([hc0, 0.1 * span]))
    hc, sigma = float(x[0]), abs(float(x[1]))
    dof = max(h.size - 2, 1)
    try:
        cov = np.linalg.inv(jac.T @ jac) * float(np.sum(resid**2)) / dof
        stds = np.sqrt(np.maximum(np.diag(cov), 0.0))
    except np.linalg.LinAlgError:
        stds = np.array([math.nan, math.nan])
    return LoopFit(hc, float(stds[0]), sigma, float(stds[1]))


def sheppard_sigma(low: np.ndarray, high: np.ndarray) -> float:
    """Spread of switching fields from interval midpoints with Sheppard's correction (NaN if not defined)."""
    low, high = np.asarray(low, dtype=float), np.asarray(high, dtype=float)
    done = np.isfinite(low) & np.isfinite(high)
    if done.sum() < 2:
        return math.nan
    mid = 0.5 * (low[done] + high[done])
    width = float(np.median(high[done] - low[done]))
    var = float(np.var(mid, ddof=1)) - width**2 / 12.0
    return math.sqrt(var) if var > 0 else math.nan


def tagawa_sigma(major_field: np.ndarray, major_m: np.ndarray, recoil_field: np.ndarray, recoil_m: np.ndarray,
                 ) -> tuple[float, float, int]:
    """Interaction-corrected spread from the major ascending branch and one ascending recoil curve.

    Both curves start at their turning point (first entry). Returns (sigma, its standard error, points used)
    [A/m]; NaN when fewer than two magnetisations lie inside both curves' usable range.
    """
    hf, mf = np.asarray(major_field, dtype=float), np.asarray(major_m, dtype=float)
    hr, mr = np.asarray(recoil_field, dtype=float), np.asarray(recoil_m, dtype=float)
    m_r = float(mr[0])
    # the major branch as field against M: M must increase for the inversion
    order = np.argsort(mf, kind="stable")
    mf_sorted, hf_sorted = mf[order], hf[order]
    keep = np.r_[True, np.diff(mf_sorted) > 0]
    mf_sorted, hf_sorted = mf_sorted[keep], hf_sorted[keep]
    rose = np.diff(mr) > 0  # the field at which each magnetisation is first reached, as on the major branch
    points, fields = mr[1:][rose], hr[1:][rose]
    a = (1.0 + points) / 2.0
    b = (points - m_r) / 2.0
    use = (a > 0.02) & (a < 0.98) & (b > 0.02) & (b < 0.98) & (points >= mf_sorted[0]) & (points <= mf_sorted[-1])
    if use.sum() < 2:
        return math.nan, math.nan, int(use.sum())
    h_major = np.interp(points[use], mf_sorted, hf_sorted)
    delta = h_major - fields[use]
    g = ndtri(a[use]) - ndtri(b[use])
    sigma = float(np.sum(delta * g) / np.sum(g * g))
    resid = delta - sigma * g
    se = float(np.sqrt(np.sum(resid**2) / max(use.sum() - 1, 1) / np.sum(g * g)))
    return sigma, se, int(use.sum())
