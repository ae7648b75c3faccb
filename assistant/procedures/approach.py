"""Stepped coarse approach: let the feedback extend Z at each coarse position until the amplitude reaches the
setpoint; if Z runs out of range, retract and take coarse steps covering less than the Z range just searched,
so the surface can never be skipped. When found, re-centre so the surface sits at mid-range Z.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

from assistant.errors import AssistantError
from assistant.procedures.events import CancelToken, Notice, Progress, Sink, null_sink
from assistant.procedures.guard import SafetyLimits, safety_guard
from drivers.base import Capability


class NoSurfaceFound(AssistantError, RuntimeError):
    """The allowed coarse travel was used up without the amplitude reaching the setpoint."""


class ApproachSettingsError(AssistantError, ValueError):
    """The drive and setpoint cannot engage this lever (found before any coarse motion)."""


_RETRACTED = 0.02  # Z below this fraction of its range counts as pulled back by the feedback (rule of thumb)


@dataclass(frozen=True)
class ApproachSettings:
    drive_frequency_hz: float
    drive_amplitude_v: float
    setpoint_v: float
    free_amplitude_v: float
    search_fraction: float = 0.8  # each coarse move covers this fraction of the Z range already searched
    tolerance: float = 0.05  # amplitude within 5 % of the setpoint counts as engaged


@dataclass
class ApproachResult:
    engaged: bool
    z_m: float
    coarse_position_m: float
    coarse_travel_m: float
    cycles: int
    trace_coarse_m: list[float] = field(default_factory=list)
    trace_z_m: list[float] = field(default_factory=list)
    trace_amplitude_v: list[float] = field(default_factory=list)


def _engaged_reading(controller, settings: ApproachSettings) -> tuple[bool, float, float]:
    """Switch feedback on; the surface is within reach when the feedback stopped Z short of full extension.

    The Z position alone decides: stepping the coarse motor forward after the feedback has found the surface
    would crash the tip, whatever the amplitude reading says.
    """
    controller.set_feedback(True, setpoint_v=settings.setpoint_v)
    r = controller.read(["z_m", "amplitude_v"])
    z, amp = r["z_m"], r["amplitude_v"]
    found = z < 0.995 * controller.limits.z_range_m
    return found, z, amp


def approach(controller, settings: ApproachSettings, *, limits: SafetyLimits | None = None,
             sink: Sink = null_sink, cancel: CancelToken | None = None) -> ApproachResult:
    """Approach until engaged at the setpoint with Z near mid-range. Runs inside the safety guard."""
    limits = limits or SafetyLimits()
    cancel = cancel or CancelToken()
    if not controller.has(Capability.COARSE_MOTOR):
        raise NoSurfaceFound("controller has no coarse motor: approach by hand, then engage")
    limits.check_drive(settings.drive_amplitude_v)
    z_range = controller.limits.z_range_m
    step_m = controller.limits.coarse_step_m
    t0 = time.monotonic()
    result = ApproachResult(False, 0.0, 0.0, 0.0, 0)
    with safety_guard(controller, sink=sink):
        controller.withdraw()
        controller.set_drive(settings.drive_frequency_hz, settings.drive_amplitude_v)
        start = controller.status().coarse_position_m
        # the software limit, or what the controller's own travel leaves from here if that is less (a driver that
        # does not refuse a step past its travel must not be driven there)
        allowed = min(limits.coarse_travel_max_m, controller.limits.coarse_travel_max_m - start)
        while True:
            cancel.raise_if_set()
            limits.check_sum(controller.read(["sum_v"])["sum_v"])
            holds, z, amp = _engaged_reading(controller, settings)
            if holds and z < _RETRACTED * z_range and amp < (1.0 - 2.0 * settings.tolerance) * settings.setpoint_v:
                # the feedback pulled Z all the way back although nothing is near: the free lever does not reach
                # the setpoint, so "in reach" would be a misreading (a drive that no longer fits the lever)
                raise ApproachSettingsError(
                    f"the feedback retracted Z fully with the amplitude at {amp * 1e3:.1f} mV, below the setpoint "
                    f"{settings.setpoint_v * 1e3:.1f} mV: the drive does not fit this lever; calibrate again")
            pos = controller.status().coarse_position_m
            result.cycles += 1
            result.trace_coarse_m.append(pos)
            result.trace_z_m.append(z)
            result.trace_amplitude_v.append(amp)
            travel = pos - start
            sink(Progress("approach", travel, allowed, "m", time.monotonic() - t0,
                          data={"z_m": z, "amplitude_v": amp, "coarse_m": pos}))
            if holds:
                break
            controller.set_feedback(False)
            controller.withdraw()
            if travel + settings.search_fraction * z_range > allowed:
                raise NoSurfaceFound(
                    f"no surface within the allowed coarse travel of {allowed * 1e6:g} µm "
                    f"(travelled {travel * 1e6:.1f} µm)")
            controller.step_coarse(max(1, int(settings.search_fraction * z_range / step_m)))
        # Re-centre: retract, move coarse by the distance between found Z and mid-range, re-engage.
        mid = 0.5 * z_range
        steps = int(round((z - mid) / step_m))
        # never retract the motor past its origin as the controller reports it (coarse position >= 0)
        steps = max(steps, -int(controller.status().coarse_position_m / step_m))
        if steps != 0:
            controller.set_feedback(False)
            controller.withdraw()
            controller.step_coarse(steps)
            holds, z, amp = _engaged_reading(controller, settings)
            if not holds:
                raise NoSurfaceFound("lost the surface while re-centring Z; withdraw and approach again")
        if abs(amp - settings.setpoint_v) > settings.tolerance * settings.setpoint_v:
            sink(Notice("warning", f"engaged, but the amplitude {amp * 1e3:.1f} mV is more than "
                                   f"{settings.tolerance:.0%} from the setpoint {settings.setpoint_v * 1e3:.1f} mV: "
                                   "check the feedback gains"))
        status = controller.status()
        result.engaged = True
        result.z_m = z
        result.coarse_position_m = status.coarse_position_m
        result.coarse_travel_m = status.coarse_position_m - start
        from assistant.formatting import quantity

        sink(Notice("info", f"engaged: Z extension {quantity(z, 'm')} of {quantity(z_range, 'm')}, amplitude "
                            f"{quantity(amp, 'V')} (setpoint {quantity(settings.setpoint_v, 'V')})"))
    return result
