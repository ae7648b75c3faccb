"""Positioners: limits named in errors, move times, coarse-step statistics, drift."""

import math

import numpy as np
import pytest

from simulated_stage.errors import StageLimitError
from simulated_stage.scanner import CoarseMotor, XYScanner, ZPiezo


def test_z_range_and_speed():
    z = ZPiezo(range_m=10e-6, speed_max_m_per_s=20e-6, sensor_noise_m=0.0)
    assert z.move_time_s(5e-6) == pytest.approx(0.25)
    for bad in (-1e-9, 10.001e-6, float("nan")):
        with pytest.raises(StageLimitError) as info:
            z.check(bad)
        msg = str(info.value)
        assert "z extension" in msg and "1e-05" in msg and info.value.value is bad or math.isnan(info.value.value)


def test_z_sensor_noise_level():
    z = ZPiezo(range_m=10e-6, speed_max_m_per_s=20e-6, sensor_noise_m=0.1e-9)
    z.position_m = 3e-6
    reads = z.sensor_m(np.random.default_rng(0), np.full(20000, 3e-6))
    assert reads.mean() == pytest.approx(3e-6, abs=5e-12)
    assert reads.std() == pytest.approx(0.1e-9, rel=0.03)


def test_coarse_steps_have_the_stated_mean_and_scatter():
    motor = CoarseMotor(step_m=50e-9, scatter=0.1, travel_max_m=2e-3)
    rng = np.random.default_rng(1)
    moves = np.array([motor.plan(100, rng) for _ in range(4000)])
    assert moves.mean() == pytest.approx(100 * 50e-9, rel=2e-3)
    # 100 independent steps of 10 % scatter: SD = 0.1 * 50 nm * sqrt(100) = 50 nm
    assert moves.std() == pytest.approx(50e-9, rel=0.05)


def test_coarse_travel_limit():
    motor = CoarseMotor(step_m=1e-6, scatter=0.0, travel_max_m=100e-6)
    rng = np.random.default_rng(0)
    motor.position_m = motor.plan(100, rng)
    with pytest.raises(StageLimitError, match="coarse position"):
        motor.plan(1, rng)
    with pytest.raises(StageLimitError, match="coarse position"):
        CoarseMotor(step_m=1e-6, scatter=0.0, travel_max_m=1e-3).plan(-5, rng)


def test_xy_range_and_drift():
    xy = XYScanner(range_m=10e-6, drift_m_per_s=(1e-9, -2e-9))
    xy.move(4e-6, -4e-6)
    x, y = xy.sample_frame(4e-6, -4e-6, 10.0)
    assert (float(x), float(y)) == pytest.approx((4e-6 + 10e-9, -4e-6 - 20e-9))
    with pytest.raises(StageLimitError, match="x position = 6e-06 m is outside"):
        xy.move(6e-6, 0.0)
