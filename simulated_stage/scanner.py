"""Positioners of the virtual microscope: Z piezo, coarse motor and XY scanner.

Geometry: ``z_m`` is the Z piezo extension towards the sample (0 = fully retracted); the coarse motor moves the
whole head towards the sample from its start position; the tip-surface distance at zero Z extension is
``start_gap_m - coarse_position_m``. The XY scanner drifts at a constant velocity, so the point of the sample
under the tip is the commanded position plus the drift accumulated since the stage was made.
"""

from __future__ import annotations

import math

import numpy as np

from simulated_stage.errors import StageLimitError


def _check(quantity: str, value: float, low: float, high: float, unit: str) -> float:
    if not (math.isfinite(value) and low <= value <= high):
        raise StageLimitError(quantity, value, low, high, unit)
    return float(value)


class ZPiezo:
    """Z piezo with a travel range, a speed limit and a noisy position sensor.

    The speed limit applies to moves the controller makes towards the sample and back under its own control.
    A withdraw instead steps the piezo voltage to the retracted end: moving away from the surface cannot
    crash the tip, so only the piezo's own response limits it, modelled as ``retract_time_s`` for the full
    range (a few milliseconds for a scanner with a Z resonance of a few kHz; a model, no source).
    """

    def __init__(self, *, range_m: float, speed_max_m_per_s: float, sensor_noise_m: float,
                 retract_time_s: float = 5e-3) -> None:
        self.range_m = range_m
        self.speed_max_m_per_s = speed_max_m_per_s
        self.sensor_noise_m = sensor_noise_m
        self.retract_time_s = retract_time_s
        self.position_m = 0.0

    def check(self, z_m: float) -> float:
        return _check("z extension", z_m, 0.0, self.range_m, "m")

    def move_time_s(self, z_m: float) -> float:
        """Time a move to ``z_m`` takes at the speed limit [s] (the target is checked first)."""
        return abs(self.check(z_m) - self.position_m) / self.speed_max_m_per_s

    def withdraw_time_s(self) -> float:
        """Time a full retraction from the present extension takes [s]."""
        return self.retract_time_s * self.position_m / self.range_m

    def sensor_m(self, rng: np.random.Generator, true_m: np.ndarray | float | None = None) -> np.ndarray | float:
        """Z sensor reading of ``true_m`` (default: the present position) with its white noise."""
        value = self.position_m if true_m is None else true_m
        return value + self.sensor_noise_m * rng.standard_normal(np.shape(value))


class CoarseMotor:
    """Stepper of the approach: each step moves ``step_m`` with a relative Gaussian scatter."""

    def __init__(self, *, step_m: float, scatter: float, travel_max_m: float, step_time_s: float = 2e-3) -> None:
        self.step_m = step_m
        self.scatter = scatter
        self.travel_max_m = travel_max_m
        self.step_time_s = step_time_s
        self.position_m = 0.0

    def plan(self, steps: int, rng: np.random.Generator) -> float:
        """New position after ``steps`` (positive = towards the sample); raises beyond the travel range."""
        n = abs(int(steps))
        # the sum of n independent steps: mean n*step, standard deviation step*scatter*sqrt(n)
        travel = n * self.step_m + self.step_m * self.scatter * math.sqrt(n) * float(rng.standard_normal())
        new = self.position_m + math.copysign(max(travel, 0.0), steps)
        if not 0.0 - 0.5 * self.step_m <= new <= self.travel_max_m:
            raise StageLimitError("coarse position", new, 0.0, self.travel_max_m, "m")
        return max(new, 0.0)


class XYScanner:
    """XY scanner of side ``range_m`` centred on 0, with a constant thermal drift velocity."""

    def __init__(self, *, range_m: float, drift_m_per_s: tuple[float, float] = (0.0, 0.0)) -> None:
        self.range_m = range_m
        self.drift_m_per_s = drift_m_per_s
        self.x_m = 0.0
        self.y_m = 0.0

    def check(self, x_m: float, y_m: float) -> tuple[float, float]:
        half = self.range_m / 2
        return _check("x position", x_m, -half, half, "m"), _check("y position", y_m, -half, half, "m")

    def move(self, x_m: float, y_m: float) -> None:
        self.x_m, self.y_m = self.check(x_m, y_m)

    def sample_frame(self, x_m: np.ndarray | float, y_m: np.ndarray | float,
                     t_s: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
        """Sample coordinates under the tip for commanded (x, y) at virtual time ``t_s``."""
        vx, vy = self.drift_m_per_s
        return np.asarray(x_m) + vx * np.asarray(t_s), np.asarray(y_m) + vy * np.asarray(t_s)
