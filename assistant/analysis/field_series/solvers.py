"""The two small minimisers of the switching-field fits, on numpy alone.

Loading scipy.optimize costs 0.13-0.2 s here (scipy 1.17 builds its docstrings at import), as much as all the
rest of ``mfma analyze loop``'s own work; the fits need a two-parameter simplex search and a two-parameter
least-squares fit, which these do. Both are checked against scipy.optimize in
tests/analysis/test_field_series_solvers.py.

* :func:`nelder_mead`: the simplex method of Nelder & Mead (1965, Computer Journal 7, 308; from memory) with
  the standard coefficients (reflection 1, expansion 2, contraction 1/2, shrink 1/2), and the starting simplex
  (each coordinate moved by 5 %, or to 0.00025 from zero) and stopping rule (simplex within ``xatol`` and its
  values within ``fatol`` of the best) of ``scipy.optimize.minimize(method="Nelder-Mead")``, step for step: it
  returns the same point to the last bit.
* :func:`levenberg_marquardt`: least squares by Levenberg (1944, Q. Appl. Math. 2, 164) and Marquardt (1963,
  J. SIAM 11, 431; both from memory) damping, each step solved as a linear least-squares problem (stable where
  the Jacobian is nearly singular), iterated until the sum of squares stops falling (to rounding).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np


def nelder_mead(f: Callable[[np.ndarray], float], x0: np.ndarray, *, xatol: float, fatol: float,
                maxiter: int) -> np.ndarray:
    """The point of the simplex search from ``x0`` with the least ``f`` (see the module's notes)."""
    x0 = np.asarray(x0, dtype=float)
    n = x0.size
    sim = np.repeat(x0[None, :], n + 1, axis=0)
    for k in range(n):
        sim[k + 1, k] = 1.05 * x0[k] if x0[k] != 0 else 0.00025
    fsim = np.array([f(x) for x in sim])
    order = np.argsort(fsim)
    sim, fsim = sim[order], fsim[order]
    for _ in range(1, maxiter):
        if np.max(np.abs(sim[1:] - sim[0])) <= xatol and np.max(np.abs(fsim[0] - fsim[1:])) <= fatol:
            break
        centre = np.add.reduce(sim[:-1], 0) / n  # of all points but the worst
        reflected = 2.0 * centre - sim[-1]
        f_reflected = f(reflected)
        if f_reflected < fsim[0]:
            expanded = 3.0 * centre - 2.0 * sim[-1]
            f_expanded = f(expanded)
            sim[-1], fsim[-1] = (expanded, f_expanded) if f_expanded < f_reflected else (reflected, f_reflected)
        elif f_reflected < fsim[-2]:
            sim[-1], fsim[-1] = reflected, f_reflected
        else:
            outside = f_reflected < fsim[-1]  # contract towards the reflected point, else towards the worst
            contracted = 1.5 * centre - 0.5 * sim[-1] if outside else 0.5 * centre + 0.5 * sim[-1]
            f_contracted = f(contracted)
            if f_contracted <= f_reflected if outside else f_contracted < fsim[-1]:
                sim[-1], fsim[-1] = contracted, f_contracted
            else:  # shrink towards the best point
                for j in range(1, n + 1):
                    sim[j] = sim[0] + 0.5 * (sim[j] - sim[0])
                    fsim[j] = f(sim[j])
        order = np.argsort(fsim)
        sim, fsim = sim[order], fsim[order]
    return sim[0]


def levenberg_marquardt(residuals: Callable[[np.ndarray], np.ndarray], jacobian: Callable[[np.ndarray], np.ndarray],
                        x0: np.ndarray, *, rtol: float = 1e-12, max_iterations: int = 200,
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The parameters that minimise the sum of squared ``residuals(x)`` from ``x0`` (``jacobian(x)``: residuals
    by parameters), the residuals there and the Jacobian there.

    Stops when a step moves every parameter by less than ``rtol`` of itself, lowers the sum by less than
    ``rtol`` of it, or no step lowers it at all.
    """
    x = np.asarray(x0, dtype=float)
    r = residuals(x)
    cost, damping = float(r @ r), 1e-3
    for _ in range(max_iterations):
        j = jacobian(x)
        scale = np.sqrt(np.sum(j * j, axis=0))  # Marquardt: damping in proportion to each parameter's curvature
        rhs = np.concatenate([-r, np.zeros(x.size)])
        while True:
            step = np.linalg.lstsq(np.vstack([j, np.diag(np.sqrt(damping) * scale)]), rhs, rcond=None)[0]
            r_new = residuals(x + step)
            cost_new = float(r_new @ r_new)
            if cost_new <= cost or damping > 1e16:
                break
            damping *= 10.0
        if not cost_new <= cost:  # no step lowers the sum of squares: this is its minimum
            break
        x, r, gain, cost = x + step, r_new, cost - cost_new, cost_new
        damping /= 10.0
        if np.all(np.abs(step) <= rtol * np.abs(x)) or gain <= rtol * cost:
            break
    return x, r, jacobian(x)
