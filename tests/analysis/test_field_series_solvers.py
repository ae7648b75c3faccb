"""The minimisers of the switching-field fits (assistant/analysis/field_series/solvers.py) against the reference
library they stand in for: scipy.optimize (Virtanen et al. 2020, Nature Methods 17, 261), ``minimize`` with
``method="Nelder-Mead"`` and ``least_squares``; and a linear least-squares problem against numpy's ``lstsq``."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import least_squares, minimize
from scipy.special import ndtr

from assistant.analysis.field_series.distribution import fit_intervals, fit_loop, normal_loop
from assistant.analysis.field_series.solvers import levenberg_marquardt, nelder_mead


def _rosenbrock(p):
    return float((1 - p[0]) ** 2 + 100 * (p[1] - p[0] ** 2) ** 2)


def _censored_nll(seed: int):
    """The negative log-likelihood fit_intervals minimises, on normal values grouped into 10 kA/m steps with a
    tenth of them censored."""
    rng = np.random.default_rng(seed)
    step = 10e3
    low = np.floor(rng.normal(300e3, 40e3, 200) / step) * step
    high = np.where(rng.random(200) < 0.1, np.inf, low + step)
    floor = math.log(1e-3 * step)

    def nll(p):
        sigma = math.exp(max(p[1], floor))
        prob = ndtr((high - p[0]) / sigma) - ndtr((low - p[0]) / sigma)
        return -float(np.sum(np.log(np.maximum(prob, 1e-300))))

    return nll, np.array([float(np.mean(low)), math.log(float(np.std(low)))]), 1e-6 * step, 1e-9


@pytest.mark.parametrize("case", range(12))
def test_nelder_mead_takes_scipys_steps_to_the_last_bit(case):
    rng = np.random.default_rng(case)
    if case % 3 == 0:
        f, x0, xatol, fatol = _rosenbrock, rng.normal(size=2) * 2, 1e-8, 1e-10
    elif case % 3 == 1:
        f, x0, xatol, fatol = _rosenbrock, np.array([0.0, rng.normal()]), 1e-4, 1e-4  # a zero start coordinate
    else:
        f, x0, xatol, fatol = _censored_nll(case)
    ours = nelder_mead(f, x0, xatol=xatol, fatol=fatol, maxiter=2000)
    ref = minimize(f, x0=x0, method="Nelder-Mead", options={"xatol": xatol, "fatol": fatol, "maxiter": 2000})
    np.testing.assert_array_equal(ours, ref.x)
    # and the iteration limit ends the search where scipy's does
    short = minimize(f, x0=x0, method="Nelder-Mead", options={"xatol": xatol, "fatol": fatol, "maxiter": 7})
    np.testing.assert_array_equal(nelder_mead(f, x0, xatol=xatol, fatol=fatol, maxiter=7), short.x)


def test_levenberg_marquardt_solves_a_linear_problem_as_lstsq_does():
    rng = np.random.default_rng(4)
    a = rng.normal(size=(40, 3))
    b = rng.normal(size=40)
    x, r, j = levenberg_marquardt(lambda p: a @ p - b, lambda p: a, np.zeros(3))
    np.testing.assert_allclose(x, np.linalg.lstsq(a, b, rcond=None)[0], rtol=1e-10)
    np.testing.assert_allclose(r, a @ x - b, rtol=0, atol=1e-15)
    assert j is a


def _counted_branch(seed: int, direction: int):
    """M/Ms of one branch of N(Hc, sigma^2) non-interacting elements, counted (as in the loop analysis)."""
    rng = np.random.default_rng(seed)
    n, hc, sigma = int(rng.integers(30, 2000)), rng.uniform(1e5, 4e5), rng.uniform(5e3, 8e4)
    step = float(rng.choice([2e3, 1e4, 2.5e4]))
    h_sw = rng.normal(hc, sigma, n)
    h = -direction * np.arange(6e5, -6e5 - 1, -step)
    m = np.array([np.mean(np.where(direction * x >= h_sw, direction, -direction)) for x in h])
    return h, m + rng.normal(0, 0.01, m.size) * (seed % 2)  # every other branch with some noise


@pytest.mark.parametrize("seed", range(10))
@pytest.mark.parametrize("direction", (-1, 1))
def test_loop_fit_finds_the_least_squares_minimum_scipy_converges_to(seed, direction):
    h, m = _counted_branch(seed, direction)
    fit = fit_loop(h, m, direction=direction)
    span = float(np.ptp(h))
    order = np.argsort(h)
    hc0 = abs(float(np.interp(0.0, np.maximum.accumulate(m[order]), h[order])))
    # scipy converged to rounding (its default tolerances stop 1e-6 to 1e-4 short of the minimum)
    ref = least_squares(lambda p: normal_loop(h, p[0], abs(p[1]) + 1e-9 * span, direction=direction) - m,
                        x0=[hc0, 0.1 * span], x_scale=[span, span], ftol=1e-15, xtol=1e-15, gtol=1e-15)
    assert fit.coercive == pytest.approx(ref.x[0], rel=1e-8)
    assert fit.sigma == pytest.approx(abs(ref.x[1]), rel=1e-6)
    cov = np.linalg.inv(ref.jac.T @ ref.jac) * float(np.sum(ref.fun**2)) / (h.size - 2)
    np.testing.assert_allclose([fit.coercive_std, fit.sigma_std], np.sqrt(np.diag(cov)), rtol=1e-5)


def test_interval_fit_is_scipys_nelder_mead_fit():
    # fit_intervals as it was written on scipy.optimize.minimize, line for line, gives the same numbers
    rng = np.random.default_rng(9)
    step = 10e3
    low = np.floor(rng.normal(300e3, 40e3, 300) / step) * step
    high = np.where(rng.random(300) < 0.05, np.inf, low + step)
    fit = fit_intervals(low, high)
    done = np.isfinite(high)
    mid = 0.5 * (low[done] + high[done])
    floor = math.log(1e-3 * step)

    def nll(p):
        sigma = math.exp(p[1])
        prob = ndtr((high - p[0]) / sigma) - ndtr((low - p[0]) / sigma)
        return -float(np.sum(np.log(np.maximum(prob, 1e-300))))

    ref = minimize(lambda p: nll(np.array([p[0], max(p[1], floor)])),
                   x0=np.array([float(np.mean(mid)), math.log(max(float(np.std(mid)), 0.3 * step))]),
                   method="Nelder-Mead", options={"xatol": 1e-6 * step, "fatol": 1e-9, "maxiter": 2000})
    assert fit.mean == ref.x[0] and fit.sigma == math.exp(max(ref.x[1], floor))
