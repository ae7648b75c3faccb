"""The stepped approach: engaged at the setpoint with Z near mid-range, the travel limit respected, the stage
safe when it gives up or is cancelled."""

from __future__ import annotations

import dataclasses

import pytest

from assistant.procedures.approach import ApproachSettings, NoSurfaceFound, approach
from assistant.procedures.events import CancelToken, Cancelled
from assistant.procedures.guard import SafetyLimits
from drivers.base import Capability
from tests.procedures.small_stage import open_small


def _settings(ctl) -> ApproachSettings:
    # 0.2 V of drive is a 20 nm free amplitude on the default lever; the setpoint 70 % of it
    ctl.set_drive(75e3, 0.2)
    free = ctl.read(["amplitude_v"])["amplitude_v"]
    ctl.drive_off()
    return ApproachSettings(75e3, 0.2, 0.7 * free, free)


def test_engages_at_the_setpoint_near_mid_range():
    with open_small(seed=1) as ctl:
        events = []
        result = approach(ctl, _settings(ctl), sink=events.append)
        status = ctl.status()
        z_range = ctl.limits.z_range_m
        assert result.engaged and status.engaged
        # re-centred: within one coarse step of mid-range
        assert abs(result.z_m - 0.5 * z_range) <= ctl.limits.coarse_step_m + 0.05 * z_range
        # every coarse move covered less than the Z range searched before it: the surface cannot be stepped over
        steps = [b - a for a, b in zip(result.trace_coarse_m, result.trace_coarse_m[1:])]
        assert all(s < z_range for s in steps)
        assert result.cycles == len(result.trace_z_m) and any(e.text.startswith("engaged") for e in events
                                                                  if hasattr(e, "text"))


def test_gives_up_within_the_allowed_travel_and_leaves_the_stage_safe():
    with open_small(seed=1) as ctl:
        settings = _settings(ctl)
        with pytest.raises(NoSurfaceFound, match="allowed coarse travel of 20 µm"):
            approach(ctl, settings, limits=SafetyLimits(coarse_travel_max_m=20e-6))
        assert ctl.status().safe and ctl.status().coarse_position_m <= 20e-6


def test_the_controllers_own_travel_bounds_the_approach_when_the_software_limit_is_wider():
    # a limits file may allow more coarse travel than the motor has; the approach then stops within the motor's
    # own travel instead of relying on the driver to refuse a step past it
    with open_small(seed=1) as ctl:
        settings = _settings(ctl)
        ctl.limits = dataclasses.replace(ctl.limits, coarse_travel_max_m=20e-6)
        with pytest.raises(NoSurfaceFound, match="allowed coarse travel of 20 µm"):
            approach(ctl, settings, limits=SafetyLimits(coarse_travel_max_m=1.0))
        assert ctl.status().safe and ctl.status().coarse_position_m <= 20e-6


def test_cancel_stops_the_approach_safely():
    with open_small(seed=1) as ctl:
        token = CancelToken()
        token.set()
        with pytest.raises(Cancelled):
            approach(ctl, _settings(ctl), cancel=token)
        assert ctl.status().safe


def test_a_controller_without_a_coarse_motor_is_told_to_approach_by_hand():
    with open_small() as ctl:
        ctl.capabilities = frozenset(ctl.capabilities - {Capability.COARSE_MOTOR})
        with pytest.raises(NoSurfaceFound, match="by hand"):
            approach(ctl, ApproachSettings(75e3, 0.2, 0.1, 0.15))
