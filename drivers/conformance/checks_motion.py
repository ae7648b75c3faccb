"""Checks that move the stage clear of the surface: ``motion`` (the ``engaged`` ones are in :mod:`.checks_engaged`).

Sizes: Z moves of at most a fifth of the range, XY moves of 0.5 µm about the centre, six coarse steps and back, a
coarse move of half a Z range (stopped by abort()); the refusals of a force curve, a line's second pass and a coarse
move beyond the limits run in a thread, stopped by abort() within 200 ms if a driver accepts them. Second passes are
at a lift of 100 nm (well above the tapping amplitude of an MFM lever: common practice, no source).
"""

from __future__ import annotations

import math
import time

import numpy as np

from drivers.base import Capability, ForceCurve, LineSpec, SecondPass
from drivers.conformance.kit import ABORT_LIMIT_S, Fail, Kit, NotApplicable, Timer, field_left_on
from drivers.conformance.trials import (abort_during, capability_missing, drive_point, refused, refused_at_once,
                                        status_of, z_move_refused)
from drivers.errors import CapabilityMissing

LIFT_M = 100e-9
SPEED_TOLERANCE = 0.1  # a move may look up to 10 % faster than the limit (clock granularity)
GUARD_MIN_S = 0.02  # the shortest wait before a move past the coarse travel that was not refused is aborted


# ---- motion --------------------------------------------------------------------------------------------------

def z_limit_high(kit: Kit) -> str:
    z = kit.controller.limits.z_range_m * (1 + 1e-3)
    z_move_refused(kit.controller, z, "beyond the Z range")
    return f"Z just beyond its range ({z:g} m) refused, Z stayed at 0"


def xy_limits(kit: Kit) -> str:
    ctl, size = kit.controller, kit.controller.limits.scan_size_max_m
    over = size * (1 + 1e-2)
    for x, y in ((over, 0.0), (0.0, -over)):
        refused(lambda: ctl.move_xy(x, y), f"move_xy({x:g} m, {y:g} m) beyond the scan range")
    said = f"XY positions {over:g} m from the centre refused"
    if ctl.has(Capability.TWO_PASS_LINE):
        spec = LineSpec(0.0, -over / 2, over, 8, 1.0, (SecondPass(LIFT_M),))
        refused(lambda: ctl.scan_line(spec), f"scan_line of length {over:g} m beyond the scan size {size:g} m")
        said += f"; a line {over:g} m long refused"
    return said


def _refused_left_safe(ctl, call, what: str, *, also: tuple[type, ...] = ()) -> None:
    """``call`` must be refused (abort() stops it after 200 ms if it runs) and leave the stage safe with Z at 0."""
    refused_at_once(ctl, call, what, also=also)
    s = status_of(ctl)
    if not s.safe:
        raise Fail(f"{what} was refused, yet status reports engaged={s.engaged}, feedback_on={s.feedback_on}, "
                   f"z_m={s.z_m:g}, drive_on={s.drive_on}, bias_v={s.bias_v:g} (clipped?)")


def force_curve_limits(kit: Kit) -> str:
    """A force curve whose end lies beyond the Z range, below 0 or is not finite is refused with LimitExceeded
    before Z moves. Were it accepted, Z would extend at most its range (the tip stays clear: the plan asks for a
    Z range plus 1 µm), and abort() stops it after 200 ms."""
    ctl, z_range = kit.controller, kit.controller.limits.z_range_m
    if not ctl.has(Capability.FORCE_CURVE):
        raise NotApplicable
    ends = (z_range * (1 + 1e-3), -1e-3 * z_range, math.nan, math.inf)
    for z in ends:
        _refused_left_safe(ctl, lambda z=z: ctl.force_curve(z, 64), f"force_curve to {z:g} m (Z range {z_range:g} m)")
    return (f"force curves to just beyond the Z range ({ends[0]:g} m), below 0, NaN and inf refused with "
            f"LimitExceeded; Z stayed at 0")


def line_limits(kit: Kit) -> str:
    """A line whose second pass asks for a bias beyond ±``bias_max_v`` or a lift height outside the Z range (or
    not finite) is refused with LimitExceeded before it starts (without the bias capability, CapabilityMissing
    for the bias too). The kit is not engaged here, so a driver that accepted would first have to find the
    surface, which lies beyond the Z range; abort() stops it after 200 ms."""
    ctl, lim = kit.controller, kit.controller.limits
    if not ctl.has(Capability.TWO_PASS_LINE):
        raise NotApplicable
    bias = lim.bias_max_v * (1 + 1e-3) + 1e-12 if lim.bias_max_v > 0 else 1.0
    also = () if ctl.has(Capability.BIAS) else (CapabilityMissing,)
    passes = [(SecondPass(LIFT_M, bias), also, f"a bias of {bias:g} V"),
              (SecondPass(LIFT_M, -bias), also, f"a bias of {-bias:g} V"),
              (SecondPass(lim.z_range_m * (1 + 1e-3)), (), f"a lift of {lim.z_range_m * (1 + 1e-3):g} m"),
              (SecondPass(-LIFT_M), (), f"a lift of {-LIFT_M:g} m"),
              (SecondPass(math.nan), (), "a lift of nan m"), (SecondPass(LIFT_M, math.nan), also, "a bias of nan V")]
    for second, ok, what in passes:
        spec = LineSpec(0.0, -0.5e-6, 1e-6, 8, 8.0, (SecondPass(LIFT_M), second))
        _refused_left_safe(ctl, lambda spec=spec: ctl.scan_line(spec),
                           f"scan_line with {what} in its second pass (bias limit ±{lim.bias_max_v:g} V, Z range "
                           f"{lim.z_range_m:g} m)", also=ok)
    return (f"lines whose second pass asks for ±{bias:g} V (limit ±{lim.bias_max_v:g} V), a lift beyond the Z "
            f"range or below 0, or NaN refused; the bias stayed at 0 V and Z at 0")


def nonfinite_motion(kit: Kit) -> str:
    ctl = kit.controller
    calls = [(f"move_z({v})", lambda v=v: ctl.move_z(v)) for v in (math.nan, math.inf)]
    calls += [(f"move_xy({x}, {y})", lambda x=x, y=y: ctl.move_xy(x, y)) for x, y in ((math.nan, 0.0),
                                                                                      (0.0, -math.inf))]
    for what, call in calls:
        refused(call, what)
    if status_of(ctl).z_m != 0.0:
        raise Fail("a refused non-finite move left Z away from 0")
    return "NaN and infinite Z and XY targets refused; Z stayed at 0"


def undeclared_moving(kit: Kit) -> str:
    ctl = kit.controller
    tried = []
    if not ctl.has(Capability.COARSE_MOTOR):
        capability_missing(lambda: ctl.step_coarse(-1), "step_coarse without coarse_motor")
        tried.append("step_coarse")
    if not ctl.has(Capability.FORCE_CURVE):
        capability_missing(lambda: ctl.force_curve(0.0, 2), "force_curve without force_curve")
        tried.append("force_curve")
    if not ctl.has(Capability.TWO_PASS_LINE):
        capability_missing(lambda: ctl.scan_line(LineSpec(0.0, 0.0, 0.0, 2, 1.0)), "scan_line without two_pass_line")
        tried.append("scan_line")
    if not tried:
        raise NotApplicable
    return f"undeclared {', '.join(tried)} refused with CapabilityMissing"


def _move_z_timed(ctl, z: float) -> tuple[float, float]:
    start = status_of(ctl).z_m
    t = Timer()
    ctl.move_z(z)
    return t(), abs(z - start)


def z_move(kit: Kit) -> str:
    ctl, lim = kit.controller, kit.controller.limits
    dz = min(0.2 * lim.z_range_m, 4e-6, lim.z_speed_max_m_per_s * 0.5)
    out_s, _ = _move_z_timed(ctl, dz)
    s = status_of(ctl)
    sensor = ctl.read(["z_m"])["z_m"]
    back_s, _ = _move_z_timed(ctl, 0.0)
    least = dz / lim.z_speed_max_m_per_s * (1 - SPEED_TOLERANCE)
    for what, took in (("out", out_s), ("back", back_s)):
        if took < least:
            raise Fail(f"Z moved {dz * 1e6:.2f} µm {what} in {took * 1e3:.1f} ms: {dz / max(took, 1e-9) * 1e6:.0f} "
                       f"µm/s, above the speed limit {lim.z_speed_max_m_per_s * 1e6:g} µm/s (a stage without "
                       f"wall-clock time, such as a simulated one at fast pace, cannot pass this)")
    tol = max(0.02 * dz, 5e-9)
    for what, got in (("status().z_m", s.z_m), ("read z_m", sensor)):
        if not abs(got - dz) <= tol:
            raise Fail(f"after move_z({dz:g} m) {what} reads {got:g} (m?), expected {dz:g} m within {tol:g} m")
    if status_of(ctl).z_m != 0.0:
        raise Fail("after move_z(0) status does not report Z at 0")
    return (f"Z to {dz * 1e6:.2f} µm in {out_s * 1e3:.0f} ms and back in {back_s * 1e3:.0f} ms (limit "
            f"{lim.z_speed_max_m_per_s * 1e6:g} µm/s, at least {least * 1e3:.0f} ms each way); status and sensor "
            f"read {s.z_m * 1e6:.3f} and {sensor * 1e6:.3f} µm")


def safe_from_extended(kit: Kit) -> str:
    """``make_safe()`` and ``withdraw()`` retract an extended Z: at the signals level Z is already at 0, so only
    here can a make-safe that forgets the withdraw show. Z goes out by a fifth of its range at most (the move of
    ``motion.z_move``), with the drive on and a bias."""
    ctl, lim = kit.controller, kit.controller.limits
    dz = min(0.2 * lim.z_range_m, 4e-6, lim.z_speed_max_m_per_s * 0.5)
    ctl.move_z(dz)
    ctl.set_drive(*drive_point(ctl, kit.notes))
    if ctl.has(Capability.BIAS):
        ctl.set_bias(min(0.5, 0.1 * lim.bias_max_v))
    ctl.make_safe()
    s = status_of(ctl)
    if not s.safe:
        raise Fail(f"with Z at {dz * 1e6:.2f} µm, the drive on and a bias, make_safe() left status reporting "
                   f"z_m={s.z_m:g}, feedback_on={s.feedback_on}, drive_on={s.drive_on}, bias_v={s.bias_v:g}")
    ctl.move_z(dz)
    ctl.withdraw()
    s = status_of(ctl)
    if s.z_m != 0.0 or s.feedback_on or s.engaged:
        raise Fail(f"with Z at {dz * 1e6:.2f} µm, withdraw() left status reporting z_m={s.z_m:g}, "
                   f"feedback_on={s.feedback_on}")
    return (f"with Z at {dz * 1e6:.2f} µm, the drive on and a bias, make_safe() left the stage safe; from Z at "
            f"{dz * 1e6:.2f} µm withdraw() retracted Z to 0 with the feedback off")


def force_curve(kit: Kit) -> str:
    """A force curve in free air to the Z of ``motion.z_move`` (a fifth of the range at most): the four arrays
    have the points asked for and are finite, Z runs in metres from where it was to the end asked for and back
    (the retract is the approach reversed, within 2 % or 5 nm), and Z is back where it began afterwards."""
    ctl, lim = kit.controller, kit.controller.limits
    if not ctl.has(Capability.FORCE_CURVE):
        raise NotApplicable
    dz, points = min(0.2 * lim.z_range_m, 4e-6, lim.z_speed_max_m_per_s * 0.5), 64
    curve = ctl.force_curve(dz, points)
    if not isinstance(curve, ForceCurve):
        raise Fail(f"force_curve returned {type(curve).__name__}, not ForceCurve")
    arrays = {k: np.asarray(getattr(curve, k), dtype=float) for k in ("z_m", "deflection_v", "retract_z_m",
                                                                        "retract_deflection_v")}
    bad = [f"{k} of shape {v.shape}" for k, v in arrays.items() if v.shape != (points,) or not np.isfinite(v).all()]
    if bad:
        raise Fail(f"a force curve of {points} points returned {', '.join(bad)} (or values not finite)")
    z, back, tol = arrays["z_m"], arrays["retract_z_m"], max(0.02 * dz, 5e-9)
    if not (abs(z[0]) <= tol and abs(z[-1] - dz) <= tol and np.allclose(back, z[::-1], rtol=0, atol=tol)):
        raise Fail(f"a force curve from Z at 0 to {dz:g} m ran z_m from {z[0]:g} to {z[-1]:g} and retract_z_m from "
                   f"{back[0]:g} to {back[-1]:g} (m?; expected 0 to {dz:g} m and back)")
    after = status_of(ctl).z_m
    if not abs(after) <= tol:
        raise Fail(f"after a force curve from Z at 0 status reports Z at {after:g} m, not back where it began")
    return (f"a force curve of {points} points to {dz * 1e6:.2f} µm: arrays as asked, Z in metres out and back, "
            f"deflection {np.ptp(arrays['deflection_v']) * 1e3:.3g} mV peak to peak, Z back at 0")


def xy_move(kit: Kit) -> str:
    ctl = kit.controller
    for x, y in ((0.5e-6, -0.5e-6), (-0.5e-6, 0.5e-6), (0.0, 0.0)):
        ctl.move_xy(x, y)
    return "the scanner moved to (0.5, -0.5) µm, (-0.5, 0.5) µm and back to the centre"


def withdraw_wins(kit: Kit) -> str:
    ctl, lim = kit.controller, kit.controller.limits
    dz = min(0.2 * lim.z_range_m, lim.z_speed_max_m_per_s * 2.0)
    nominal = dz / lim.z_speed_max_m_per_s
    trial = abort_during(ctl, lambda: ctl.move_z(dz), f"Z move of {dz * 1e6:.2f} µm", nominal,
                         after_s=min(0.05, nominal / 4))
    said = trial.judge(ctl)
    time.sleep(0.05)
    z = status_of(ctl).z_m
    if z != 0.0:
        raise Fail(f"50 ms after the abort Z is at {z:g} m: the move carried on after the withdraw")
    return said + "; Z stayed at 0 afterwards"


def abort_force_curve(kit: Kit) -> str:
    """``abort()`` during a force curve in free air (out to a fifth of the Z range at most and back, which takes at
    least twice that over the speed limit) stops it (Aborted) and leaves the stage safe with Z at 0."""
    ctl, lim = kit.controller, kit.controller.limits
    if not ctl.has(Capability.FORCE_CURVE):
        raise NotApplicable
    dz = min(0.2 * lim.z_range_m, lim.z_speed_max_m_per_s * 1.0)
    nominal = 2 * dz / lim.z_speed_max_m_per_s
    trial = abort_during(ctl, lambda: ctl.force_curve(dz, 64), f"force curve to {dz * 1e6:.2f} µm", nominal,
                         after_s=min(0.05, nominal / 4))
    return trial.judge(ctl)


def _steps_back(lim, start_m: float, out_steps: int) -> int:
    """How many steps bring the coarse motor back after ``out_steps`` out from ``start_m``: all of them, unless
    it began less than a step from the start of its travel, then one fewer. Steps scatter (on the simulated
    stage by 10 % each), so coming all the way back from there can ask to pass the start, which a motor may
    refuse; the one step left is taken back by the next run, which begins a step or more from the start."""
    return out_steps if start_m >= lim.coarse_step_m else out_steps - 1


def coarse(kit: Kit) -> str:
    """One coarse step and then five move the motor about five nominal steps towards the sample with the five
    (positive = towards it), and coming back returns it to where it was (within a step when it began at the
    start: :func:`_steps_back`). The checks after it time a step from these: the five's time over five (the
    call's own overhead included: the longest a step can take, to time an abort) and the five's time less the
    one's over four (the overhead left out: the shortest, for the guard of a move that should be refused)."""
    ctl, lim = kit.controller, kit.controller.limits
    if not ctl.has(Capability.COARSE_MOTOR):
        raise NotApplicable
    p0 = status_of(ctl).coarse_position_m
    t = Timer()
    ctl.step_coarse(1)
    one_s = t()
    pm = status_of(ctl).coarse_position_m
    t = Timer()
    ctl.step_coarse(5)
    five_s = t()
    kit.notes["coarse_step_s"] = five_s / 5
    kit.notes["coarse_step_fast_s"] = max(five_s - one_s, 0.0) / 4
    p1 = status_of(ctl).coarse_position_m
    back = _steps_back(lim, p0, 6)
    ctl.step_coarse(-back)
    p2 = status_of(ctl).coarse_position_m
    nominal = 5 * lim.coarse_step_m
    if not 0.5 * nominal <= p1 - pm <= 1.5 * nominal:
        raise Fail(f"5 coarse steps towards the sample changed coarse_position_m by {p1 - pm:g}, expected about "
                   f"{nominal:g} m (positive = towards the sample)")
    if not abs(p2 - p0 - (6 - back) * lim.coarse_step_m) <= 0.5 * nominal:
        raise Fail(f"6 steps forward and {back} back left the coarse position {p2 - p0:g} m from the start")
    return (f"one coarse step took {one_s * 1e3:.0f} ms, then 5 moved {(p1 - pm) * 1e9:.0f} nm towards the sample "
            f"(nominal {nominal * 1e9:.0f} nm) in {five_s * 1e3:.0f} ms; {back} back left it {(p2 - p0) * 1e9:.0f} nm "
            f"from where it began")


def abort_coarse(kit: Kit) -> str:
    """``abort()`` during a coarse move towards the sample stops the motor (the call raises Aborted) and leaves
    the stage safe; the approach moves the coarse motor in long moves, and a stop must not wait for one to end.

    The move is half a Z range long, within the clearance the plan asks for even if the abort does nothing, and
    the abort comes after a quarter of its time (at most 50 ms), timed by ``motion.coarse``. A motor that covers
    half a Z range in less than 50 ms cannot be stopped part of the way with any certainty, so the check does not
    apply. The motor then steps back to where it began (:func:`_steps_back`)."""
    ctl, lim = kit.controller, kit.controller.limits
    if not ctl.has(Capability.COARSE_MOTOR):
        raise NotApplicable
    step_s = kit.notes.get("coarse_step_s")
    if step_s is None:
        raise Fail("not checked: motion.coarse did not time the coarse steps")
    steps = max(1, int(0.5 * lim.z_range_m / lim.coarse_step_m))
    nominal = steps * step_s
    if nominal < 0.05:
        raise NotApplicable
    kit.notes["abort_coarse"] = "failed"
    p0 = status_of(ctl).coarse_position_m
    what = f"coarse move of {steps} steps ({steps * lim.coarse_step_m * 1e6:.2f} µm)"
    try:
        said = abort_during(ctl, lambda: ctl.step_coarse(steps), what, nominal, after_s=min(0.05, nominal / 4),
                            join_s=max(2.0, 2 * nominal)).judge(ctl)
    finally:
        moved = status_of(ctl).coarse_position_m - p0
        back = _steps_back(lim, p0, round(moved / lim.coarse_step_m))
        if back > 0:
            ctl.step_coarse(-back)
    if moved > 0.9 * steps * lim.coarse_step_m:
        raise Fail(f"after abort() the {what} went on to the end: the coarse position moved {moved * 1e6:.2f} µm")
    kit.notes["abort_coarse"] = "works"
    return said + f"; the motor had moved {moved * 1e9:.0f} nm of {steps * lim.coarse_step_m * 1e9:.0f} nm"


def coarse_travel(kit: Kit) -> str:
    """A coarse move past the end of the travel (``limits.coarse_travel_max_m``) is refused with LimitExceeded
    and leaves the coarse position where it was and the stage safe.

    On a real instrument the kit must not drive the motor into its end stop, nor the tip into the sample, to see
    this. So it asks for twice the whole travel, in steps of the nominal size, from wherever the motor is: beyond
    the remaining travel from any position within it, and so far beyond that no scatter of the step size can
    bring the request back inside (a driver may check the travel it plans rather than the step count). A
    conforming driver refuses that before the motor moves. A driver that accepts it would move towards the
    sample, so the request runs in a thread and ``abort()`` stops it once the motor could have covered half a Z
    range at the speed ``motion.coarse`` measured (0.02 to 0.2 s); the plan asks for a Z range plus 1 µm of
    clearance. Where ``motion.abort_coarse`` showed that abort() does not stop a coarse move, nothing could stop
    a driver that accepted, so the move is not asked for and the check fails. A driver that ignores where the
    motor is and checks only against the whole travel is not caught: the kit would have to move it most of the
    way first. Stepping beyond the start away from the sample is not asked: the interface does not say it is
    refused.
    """
    ctl, lim = kit.controller, kit.controller.limits
    if not ctl.has(Capability.COARSE_MOTOR):
        raise NotApplicable
    if kit.notes.get("abort_coarse") == "failed":
        raise Fail("not asked: abort() did not stop a coarse move (motion.abort_coarse), so nothing could stop a "
                   "driver that accepted a move past the travel")
    step_s = kit.notes.get("coarse_step_fast_s") or 0.0
    guard_s = min(ABORT_LIMIT_S, max(GUARD_MIN_S, 0.5 * lim.z_range_m / lim.coarse_step_m * step_s))
    before = status_of(ctl).coarse_position_m
    steps = math.ceil(2 * lim.coarse_travel_max_m / lim.coarse_step_m)
    what = (f"step_coarse({steps}), {steps * lim.coarse_step_m * 1e3:.3g} mm towards the sample from "
            f"{before * 1e6:.2f} µm (travel {lim.coarse_travel_max_m * 1e3:.3g} mm)")
    refused_at_once(ctl, lambda: ctl.step_coarse(steps), what, stop_after_s=guard_s)
    s = status_of(ctl)
    moved = s.coarse_position_m - before
    if not abs(moved) <= 0.5 * lim.coarse_step_m:
        raise Fail(f"{what} was refused, yet the coarse position moved {moved * 1e9:.0f} nm")
    if not s.safe:
        raise Fail(f"after the refused {what} status is not safe (engaged={s.engaged}, z_m={s.z_m:g}, "
                   f"drive_on={s.drive_on}, bias_v={s.bias_v:g})")
    left = field_left_on(ctl)
    if left is not None:
        raise Fail(f"after the refused {what} the field reads {left:g} A/m")
    return f"{what} refused with LimitExceeded; the coarse position changed by {abs(moved) * 1e9:.0f} nm; stage safe"


MOTION = [("motion.z_limit_high", z_limit_high), ("motion.xy_limits", xy_limits),
          ("motion.force_curve_limits", force_curve_limits), ("motion.line_limits", line_limits),
          ("motion.nonfinite", nonfinite_motion), ("motion.capabilities_undeclared", undeclared_moving),
          ("motion.z_move", z_move), ("motion.safe_from_extended", safe_from_extended),
          ("motion.force_curve", force_curve), ("motion.xy_move", xy_move), ("motion.withdraw_wins", withdraw_wins),
          ("motion.abort_force_curve", abort_force_curve), ("motion.coarse", coarse),
          ("motion.abort_coarse", abort_coarse), ("motion.coarse_travel", coarse_travel)]
