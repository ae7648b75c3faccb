"""Checks on the surface: ``engaged`` (asks first).

The line is 1 µm long with 32 pixels, its second passes at a lift of 100 nm (well above the tapping amplitude of
an MFM lever: common practice, no source), and the approach may use at most 300 µm of coarse travel (or the
controller's own travel limit if that is shorter).
"""

from __future__ import annotations

import time

import numpy as np

from drivers.base import Capability, LineData, LineSpec, SecondPass
from drivers.conformance.checks_motion import LIFT_M
from drivers.conformance.kit import Fail, Kit, NotApplicable
from drivers.conformance.trials import abort_during, engage, status_of

TRAVEL_MAX_M = 300e-6


# ---- engaged -------------------------------------------------------------------------------------------------

def approach(kit: Kit) -> str:
    ctl = kit.controller
    try:
        return engage(ctl, kit.notes, travel_max_m=min(TRAVEL_MAX_M, ctl.limits.coarse_travel_max_m))
    finally:
        kit.notes["engaged"] = status_of(ctl).engaged
        if not kit.notes["engaged"]:
            kit.settle()


def _engaged(kit: Kit) -> None:
    if not kit.notes.get("engaged"):
        after = kit.notes.get("withdrawn_after")
        raise Fail(f"not run: the stage was made safe after {after} failed" if after else
                   "not engaged: the approach did not succeed")
    if not kit.controller.has(Capability.TWO_PASS_LINE):
        raise NotApplicable


def line(kit: Kit) -> str:
    _engaged(kit)
    ctl = kit.controller
    px = 32
    spec = LineSpec(0.0, -0.5e-6, 1e-6, px, 8.0, (SecondPass(LIFT_M), SecondPass(LIFT_M)))
    data = ctl.scan_line(spec)
    if not isinstance(data, LineData):
        raise Fail(f"scan_line returned {type(data).__name__}, not LineData")
    topo, err = np.asarray(data.topography_m), np.asarray(data.amplitude_error_v)
    if topo.shape != (px,) or err.shape != (px,) or len(data.passes) != 2:
        raise Fail(f"a {px}-pixel line with 2 second passes gave topography {topo.shape}, amplitude error "
                   f"{err.shape}, {len(data.passes)} passes")
    z_range = ctl.limits.z_range_m
    if not (np.isfinite(topo).all() and np.abs(topo).max() <= 10 * z_range and np.ptp(topo) < 0.5 * z_range):
        raise Fail(f"topography_m spans {np.nanmin(topo):g} .. {np.nanmax(topo):g}: not metres of a surface?")
    for k, p in enumerate(data.passes):
        ph, amp = np.asarray(p.phase_deg), np.asarray(p.amplitude_v)
        if ph.shape != (px,) or amp.shape != (px,) or p.lift_height_m != LIFT_M or p.bias_v != 0.0:
            raise Fail(f"pass {k}: phase {ph.shape}, amplitude {amp.shape}, lift {p.lift_height_m:g} m, bias "
                       f"{p.bias_v:g} V; asked {px} pixels at {LIFT_M:g} m, 0 V")
        if not (np.isfinite(ph).all() and np.abs(ph).max() <= 180 and np.isfinite(amp).all() and (amp >= 0).all()):
            raise Fail(f"pass {k}: phase outside ±180° or amplitude negative or not finite")
        df = p.frequency_shift_hz
        if ctl.has(Capability.FREQUENCY_SHIFT) and (df is None or np.asarray(df).shape != (px,)
                                                    or not np.isfinite(df).all()):
            raise Fail(f"pass {k}: frequency_shift declared but the pass carries {df!r:.60}")
    gap = float(np.mean(data.passes[1].phase_deg) - np.mean(data.passes[0].phase_deg))
    return (f"one line of {px} pixels with two passes at {LIFT_M * 1e9:.0f} nm: shapes as asked, topography "
            f"{np.ptp(topo) * 1e9:.2f} nm peak to peak, phase within ±180°, the repeat's mean within "
            f"{abs(gap):.3f}° of the first pass")


def biased_line(kit: Kit) -> str:
    """A second pass's bias holds during that pass only: after the line the bias is back where ``set_bias`` left
    it, so the next line's first pass, on the surface, does not run biased."""
    _engaged(kit)
    ctl = kit.controller
    if not ctl.has(Capability.BIAS):
        raise NotApplicable
    bias = min(0.5, 0.5 * ctl.limits.bias_max_v)
    ctl.set_bias(0.0)
    spec = LineSpec(0.0, -0.5e-6, 1e-6, 32, 8.0, (SecondPass(LIFT_M, bias), SecondPass(LIFT_M, -bias)))
    data = ctl.scan_line(spec)
    said = [float(p.bias_v) for p in data.passes]
    after = status_of(ctl).bias_v
    if not abs(after) <= 0.01 * bias:  # a read-back within 1 % of the pass's bias counts as the 0 V set
        ctl.set_bias(0.0)
        raise Fail(f"after a line with second passes at +{bias:g} and -{bias:g} V the bias reads {after:g} V, not the "
                   "0 V set before it: the next line's first pass would run biased on the surface")
    if said != [bias, -bias]:
        raise Fail(f"second passes asked at +{bias:g} and -{bias:g} V report {said} V")
    return (f"a line with second passes at +{bias:g} and -{bias:g} V: each pass reports its bias, and the bias is "
            "back at the 0 V set before the line")


def abort_mid_line(kit: Kit) -> str:
    _engaged(kit)
    ctl = kit.controller
    passes = (SecondPass(LIFT_M),) * 3
    rate = 2.0
    spec = LineSpec(0.0, -0.5e-6, 1e-6, 32, rate, passes)
    said = abort_during(ctl, lambda: ctl.scan_line(spec), "scan line", (1 + len(passes)) / rate).judge(ctl)
    kit.notes["engaged"] = False
    return said


def watchdog(kit: Kit) -> str:
    ctl = kit.controller
    limit_of = getattr(ctl, "server_watchdog_s", None)
    if not callable(limit_of):
        raise NotApplicable
    limit = limit_of()
    if limit is None:
        raise Fail("the server's watchdog is off: nothing withdraws the tip if this client falls silent")
    if limit > 60:
        raise Fail(f"the server's watchdog waits {limit:g} s, longer than this kit waits (60 s)")
    engage(ctl, kit.notes, travel_max_m=min(TRAVEL_MAX_M, ctl.limits.coarse_travel_max_m))
    silent = limit + max(0.25, 0.2 * limit)  # the server looks every few tens of ms
    time.sleep(silent)
    s = status_of(ctl)
    if not s.safe:
        raise Fail(f"engaged, then silent for {silent:.1f} s (server watchdog {limit:g} s): status still reports "
                   f"engaged={s.engaged}, z_m={s.z_m:g}, drive_on={s.drive_on}")
    return (f"engaged, then silent for {silent:.1f} s: the server's watchdog ({limit:g} s) had withdrawn the tip, "
            f"switched the drive off and set the bias to 0 V")


ENGAGED = [("engaged.approach", approach), ("engaged.line", line), ("engaged.biased_line", biased_line),
           ("engaged.abort_mid_line", abort_mid_line), ("engaged.watchdog", watchdog)]
