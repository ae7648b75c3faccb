"""Force curves on the virtual microscope: extend Z and back with the feedback suspended, recording the static
deflection. The tip follows the stable branch of the lever equilibrium k d = F(gap), solved on a dense gap grid:
snap-in on approach, adhesion on retract."""

from __future__ import annotations

import math

import numpy as np

from simulated_stage.errors import BAD_REQUEST, StageFault
from simulated_stage.results import ForceCurveResult


def force_curve(scope, z_stop_m: float, points: int) -> ForceCurveResult:
    """Extend Z of ``scope`` (a :class:`~simulated_stage.instrument.VirtualMicroscope`) from its present value
    to ``z_stop_m`` and back; deflection in volts through the static InvOLS."""
    z_stop = scope.z.check(z_stop_m)
    if not 2 <= int(points) <= 100_000:
        raise StageFault(BAD_REQUEST, f"points = {points} is outside [2, 100000]")
    scope.require_laser()
    was_on, scope.feedback.on = scope.feedback.on, False
    z0 = scope.z.position_m
    x, y = scope.here()
    base = scope.surface_gap0_m() - scope.height_here_m()
    z_app = np.linspace(z0, z_stop, int(points))
    t_app = base - z_app
    lo, hi = min(t_app.min(), -1e-9), t_app.max() + 1e-9
    grid = np.linspace(lo, hi, 4001)
    dense_lo, dense_hi = max(lo, -10e-9), min(hi, 30e-9)
    if dense_hi > dense_lo:
        grid = np.union1d(grid, np.linspace(dense_lo, dense_hi, 8001))
    force = np.asarray(scope.sample.contact_force_n(float(x), float(y), grid, bias_v=scope.bias_v), dtype=float)
    d0 = grid - force / scope.k  # undeflected gap that puts the tip at each grid gap
    desc, cm = grid[::-1], np.minimum.accumulate(d0[::-1])
    i = np.clip(np.searchsorted(-cm, -t_app, side="left"), 0, grid.size - 1)
    d_app = desc[i]
    z_ret = z_app[::-1]
    t_ret = base - z_ret
    cmax = np.maximum.accumulate(d0)
    j = np.clip(np.searchsorted(cmax, t_ret, side="left"), 0, grid.size - 1)
    d_ret = grid[j]
    detector, rng = scope.detector, scope.rng
    noise = detector.white_noise_v_per_rthz * math.sqrt(scope.lockin.bandwidth_hz())
    defl_app = detector.static_volts(d_app - t_app) + noise * rng.standard_normal(t_app.size)
    defl_ret = detector.static_volts(d_ret - t_ret) + noise * rng.standard_normal(t_ret.size)
    scope.clock.advance(2 * abs(z_stop - z0) / scope.z.speed_max_m_per_s)
    scope.sample.expose(np.atleast_1d(x), np.atleast_1d(y), np.atleast_1d(max(float(d_app.min()), 0.0)))
    scope.feedback.on = was_on
    scope.settle()
    return ForceCurveResult(z_app, detector.clip(defl_app * scope.laser_fraction), z_ret,
                            detector.clip(defl_ret * scope.laser_fraction))
