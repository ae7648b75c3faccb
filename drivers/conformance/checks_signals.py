"""Checks that move nothing: signals, capabilities, and safety without motion (the identity checks are in
:mod:`.checks_identity`).
"""

from __future__ import annotations

import math

import numpy as np

from drivers.base import CHANNELS, Capability, Controller
from drivers.conformance.kit import ABORT_LIMIT_S, Fail, Kit, NotApplicable, Timer
from drivers.conformance.trials import (abort_during, capability_missing, close, drive_point, refused,
                                        status_of, z_move_refused)


# ---- signals -------------------------------------------------------------------------------------------------

def start_safe(kit: Kit) -> str:
    kit.settle()
    s = status_of(kit.controller)
    if not s.safe:
        raise Fail(f"after make_safe() status reports engaged={s.engaged}, feedback_on={s.feedback_on}, "
                   f"z_m={s.z_m:g}, drive_on={s.drive_on}, bias_v={s.bias_v:g}")
    return "made safe to begin with: status reports withdrawn, drive off, bias 0 V"


def read(kit: Kit) -> str:
    ctl = kit.controller
    together = ctl.read(list(CHANNELS))
    if not isinstance(together, dict) or set(together) != set(CHANNELS):
        keys = sorted(together) if isinstance(together, dict) else together
        raise Fail(f"read({list(CHANNELS)}) returned keys {keys!r}")
    for name in CHANNELS:
        alone = ctl.read([name])
        for got in (together[name], alone.get(name)):
            if not isinstance(got, float) or not math.isfinite(got):
                raise Fail(f"read gave {name} = {got!r} ({type(got).__name__}), not a finite float")
    z = together["z_m"]
    if abs(z) > 0.01 * ctl.limits.z_range_m:
        raise Fail(f"z_m reads {z:g} on a withdrawn stage (Z range {ctl.limits.z_range_m:g} m): not metres?")
    return (f"all {len(CHANNELS)} channels read as finite floats, together and one by one "
            f"(sum {together['sum_v']:.3g} V, z {z:.2g} m withdrawn)")


def drive(kit: Kit) -> str:
    ctl = kit.controller
    f, a = drive_point(ctl, kit.notes)
    ctl.set_drive(f, a)
    on = status_of(ctl)
    amp = ctl.read(["amplitude_v"])["amplitude_v"]
    ctl.drive_off()
    off = status_of(ctl)
    if not (on.drive_on and close(on.drive_frequency_hz, f) and close(on.drive_amplitude_v, a)):
        raise Fail(f"after set_drive({f:g} Hz, {a:g} V) status reports drive_on={on.drive_on}, "
                   f"{on.drive_frequency_hz:g} Hz, {on.drive_amplitude_v:g} V")
    if off.drive_on:
        raise Fail("after drive_off() status still reports the drive on")
    return f"drive on at {f:g} Hz, {a:g} V (read back; lock-in amplitude {amp:.3g} V), then off"


def lockin(kit: Kit) -> str:
    kit.controller.set_lockin_time_constant(1e-3)
    return "set_lockin_time_constant(1 ms) accepted"


def thermal_record(kit: Kit) -> str:
    ctl = kit.controller
    if not ctl.has(Capability.THERMAL_RECORD):
        raise NotApplicable
    rate = min(1e5, ctl.limits.sample_rate_max_hz)
    samples, chunk = 10_000, 4096
    kit.notes["thermal_record"] = "failed"
    parts = list(ctl.record_deflection(samples, rate, chunk=chunk))
    sizes = [np.asarray(p).size for p in parts]
    if sum(sizes) != samples:
        raise Fail(f"record_deflection({samples}, {rate:g} Hz) yielded {sum(sizes)} samples")
    if max(sizes) > chunk or len(parts) < 3:
        raise Fail(f"the record came in chunks of {sizes}, not in chunks of at most {chunk}")
    if not all(np.asarray(p).ndim == 1 and np.isfinite(p).all() for p in parts):
        raise Fail("a chunk is not a 1-D array of finite values")
    kit.notes["thermal_record"] = "works"
    return f"{samples} samples at {rate:g} Hz in {len(parts)} chunks of at most {chunk}, all finite"


def _around(ctl: Controller, f0: float, n: int) -> np.ndarray:
    """``n`` sweep frequencies from 5 % below ``f0`` to 5 % above it (or the controller's highest frequency)."""
    return np.linspace(0.95 * f0, min(1.05 * f0, ctl.limits.frequency_max_hz), n)


def sweep(kit: Kit) -> str:
    ctl = kit.controller
    if not ctl.has(Capability.DRIVE_SWEEP):
        raise NotApplicable
    f0, a = drive_point(ctl, kit.notes)
    freqs = _around(ctl, f0, 21)
    kit.notes["drive_sweep"] = "failed"
    data = ctl.sweep(freqs, a)
    ctl.drive_off()
    arrays = {k: np.asarray(getattr(data, k)) for k in ("frequency_hz", "amplitude_v", "phase_deg")}
    bad = [k for k, v in arrays.items() if v.shape != freqs.shape or not np.isfinite(v).all()]
    if bad:
        raise Fail(f"sweep of 21 points returned {', '.join(f'{k} of shape {arrays[k].shape}' for k in bad)}")
    if not np.allclose(arrays["frequency_hz"], freqs, rtol=1e-9):
        raise Fail("sweep returned frequencies other than those asked for")
    if (arrays["amplitude_v"] < 0).any():
        raise Fail("sweep returned negative amplitudes")
    kit.notes["drive_sweep"] = "works"
    return "a 21-point sweep returned 21 finite frequencies (as asked), amplitudes and phases"


_METHODS = {Capability.THERMAL_RECORD: "record_deflection", Capability.DRIVE_SWEEP: "sweep",
            Capability.TWO_PASS_LINE: "scan_line", Capability.BIAS: "set_bias",
            Capability.COARSE_MOTOR: "step_coarse", Capability.FORCE_CURVE: "force_curve"}


def declared(kit: Kit) -> str:
    ctl = kit.controller
    missing = [c.value for c, m in _METHODS.items()
               if ctl.has(c) and getattr(type(ctl), m) is getattr(Controller, m)]
    if missing:
        raise Fail(f"declared but not implemented (the interface's refusing method is inherited): "
                   f"{', '.join(missing)}")
    said = []
    if ctl.has(Capability.BIAS):
        v = min(0.5, 0.1 * ctl.limits.bias_max_v)
        ctl.set_bias(v)
        got = status_of(ctl).bias_v
        ctl.set_bias(0.0)
        if not close(got, v):
            raise Fail(f"bias declared, but after set_bias({v:g} V) status reports {got:g} V")
        said.append(f"bias {v:g} V read back")
    for cap, name in ((Capability.THERMAL_RECORD, "signals.thermal_record"),
                      (Capability.DRIVE_SWEEP, "signals.sweep")):
        if ctl.has(cap):  # the signals checks of these ran just before
            if kit.notes.get(cap.value) != "works":
                raise Fail(f"{cap.value} is declared but does not work (see {name})")
            said.append(f"{cap.value} works")
    return (f"every declared capability is implemented ({', '.join(said) or 'methods present'}; "
            f"moving ones are exercised at the motion and engaged levels)")


def undeclared(kit: Kit) -> str:
    ctl = kit.controller
    f, a = drive_point(ctl, kit.notes)
    tried = []
    if not ctl.has(Capability.THERMAL_RECORD):
        capability_missing(lambda: ctl.record_deflection(100, min(1e4, ctl.limits.sample_rate_max_hz)),
                           "record_deflection without thermal_record")
        tried.append("record_deflection")
    if not ctl.has(Capability.DRIVE_SWEEP):
        capability_missing(lambda: ctl.sweep(np.array([f]), a), "sweep without drive_sweep")
        tried.append("sweep")
    if not ctl.has(Capability.BIAS):
        capability_missing(lambda: ctl.set_bias(0.1 * max(ctl.limits.bias_max_v, 1.0)), "set_bias without bias")
        ctl.set_bias(0.0)  # always allowed
        tried.append("set_bias (0 V still allowed)")
    if not tried:
        raise NotApplicable
    s = status_of(ctl)
    if s.drive_on or s.bias_v != 0.0:
        raise Fail(f"a refused call left the drive on={s.drive_on} or the bias at {s.bias_v:g} V")
    return f"undeclared {', '.join(tried)} refused with CapabilityMissing and changed nothing"


# ---- safety without motion -----------------------------------------------------------------------------------

def _over(limit: float) -> float:
    return limit * (1 + 1e-3) + 1e-12


def bias_limit(kit: Kit) -> str:
    ctl, lim = kit.controller, kit.controller.limits.bias_max_v
    also = () if ctl.has(Capability.BIAS) else (CapabilityMissing,)
    for v in (_over(lim) if lim > 0 else 1.0, -_over(lim) if lim > 0 else -1.0):
        refused(lambda: ctl.set_bias(v), f"set_bias({v:g} V) beyond ±{lim:g} V", also=also)
        got = status_of(ctl).bias_v
        if got != 0.0:
            raise Fail(f"set_bias({v:g} V) was refused, yet status reports the bias at {got:g} V (clipped?)")
    return f"biases just beyond ±{lim:g} V refused, the bias stayed at 0 V"


def _refused_drive_stays_off(ctl, call, what: str, why: str = "") -> None:
    """``call`` must raise LimitExceeded and leave the drive off (not clipped into range and switched on)."""
    refused(call, what + why)
    s = status_of(ctl)
    if s.drive_on:
        raise Fail(f"{what} was refused, yet status reports the drive on at {s.drive_frequency_hz:g} Hz, "
                   f"{s.drive_amplitude_v:g} V (clipped?)")


def drive_limits(kit: Kit) -> str:
    ctl, lim = kit.controller, kit.controller.limits
    f, a = drive_point(ctl, kit.notes)
    for ff, aa, what in ((f, _over(lim.drive_max_v), "amplitude"), (f, -0.01 * lim.drive_max_v, "amplitude"),
                         (_over(lim.frequency_max_hz), a, "frequency"), (-f, a, "frequency"), (0.0, a, "frequency")):
        _refused_drive_stays_off(ctl, lambda: ctl.set_drive(ff, aa), f"set_drive({ff:g} Hz, {aa:g} V)",
                                 f" with the {what} out of range")
    return (f"drive amplitudes beyond [0, {lim.drive_max_v:g}] V and frequencies outside (0, "
            f"{lim.frequency_max_hz:g}] Hz refused; the drive stayed off")


def sweep_limits(kit: Kit) -> str:
    """A sweep drives the lever as set_drive does, so its amplitude and frequencies meet the same limits: an
    amplitude just beyond ``drive_max_v`` or below 0, a frequency just beyond ``frequency_max_hz``, at or below 0
    or NaN, anywhere in the list, is refused with LimitExceeded before the drive comes on."""
    ctl, lim = kit.controller, kit.controller.limits
    if not ctl.has(Capability.DRIVE_SWEEP):
        raise NotApplicable
    f, a = drive_point(ctl, kit.notes)
    asks = [(np.array([f, f]), _over(lim.drive_max_v)), (np.array([f, f]), -0.01 * lim.drive_max_v),
            (np.array([f, _over(lim.frequency_max_hz)]), a), (np.array([f, 0.0]), a), (np.array([-f, f]), a),
            (np.array([f, math.nan]), a), (np.array([f, f]), math.nan)]
    for freqs, amp in asks:
        _refused_drive_stays_off(ctl, lambda freqs=freqs, amp=amp: ctl.sweep(freqs, amp),
                                 f"sweep over {', '.join(f'{v:g}' for v in freqs)} Hz at {amp:g} V")
    return (f"sweeps with the amplitude outside [0, {lim.drive_max_v:g}] V, a frequency outside (0, "
            f"{lim.frequency_max_hz:g}] Hz or NaN refused in {len(asks)} calls; the drive stayed off")


def sample_rate_limit(kit: Kit) -> str:
    ctl, lim = kit.controller, kit.controller.limits.sample_rate_max_hz
    if not ctl.has(Capability.THERMAL_RECORD):
        raise NotApplicable
    refused(lambda: ctl.record_deflection(100, _over(lim)), f"record_deflection at {_over(lim):g} Hz")
    return f"a record at just above {lim:g} Hz refused"


def z_limit_low(kit: Kit) -> str:
    z = -1e-3 * kit.controller.limits.z_range_m
    z_move_refused(kit.controller, z, "below 0")
    return f"Z just below 0 ({z:g} m) refused, Z stayed at 0"


def nonfinite(kit: Kit) -> str:
    ctl = kit.controller
    f, a = drive_point(ctl, kit.notes)
    also = () if ctl.has(Capability.BIAS) else (CapabilityMissing,)
    calls = [(f"set_bias({v})", lambda v=v: ctl.set_bias(v), also) for v in (math.nan, math.inf, -math.inf)]
    calls += [(f"set_drive({ff}, {aa})", lambda ff=ff, aa=aa: ctl.set_drive(ff, aa), ())
              for ff, aa in ((math.nan, a), (f, math.nan), (math.inf, a), (f, math.inf))]
    calls.append(("set_lockin_time_constant(nan)", lambda: ctl.set_lockin_time_constant(math.nan), ()))
    if ctl.has(Capability.THERMAL_RECORD):
        calls.append(("record_deflection(100, nan)", lambda: ctl.record_deflection(100, math.nan), ()))
    for what, call, ok in calls:
        refused(call, what, also=ok)
    s = status_of(ctl)
    if s.drive_on or s.bias_v != 0.0 or math.isnan(s.drive_frequency_hz):
        raise Fail(f"after refusing NaN and infinities status reports drive_on={s.drive_on}, "
                   f"{s.drive_frequency_hz} Hz, bias {s.bias_v} V")
    return f"NaN and ±inf refused in {len(calls)} calls (bias, drive, lock-in, record); nothing changed"


def withdraw_twice(kit: Kit) -> str:
    ctl = kit.controller
    ctl.withdraw()
    ctl.withdraw()
    s = status_of(ctl)
    if s.z_m != 0.0 or s.feedback_on or s.engaged:
        raise Fail(f"after two withdraws status reports z_m={s.z_m:g}, feedback_on={s.feedback_on}")
    return "withdraw() twice in a row on a safe stage: no error, Z at 0, feedback off"


def drive_off_twice(kit: Kit) -> str:
    ctl = kit.controller
    ctl.drive_off()
    ctl.drive_off()
    if status_of(ctl).drive_on:
        raise Fail("after two drive_off() calls the drive is on")
    return "drive_off() twice in a row: no error, drive off"


def make_safe(kit: Kit) -> str:
    ctl = kit.controller
    f, a = drive_point(ctl, kit.notes)
    ctl.set_drive(f, a)
    if ctl.has(Capability.BIAS):
        ctl.set_bias(min(0.5, 0.1 * ctl.limits.bias_max_v))
    ctl.make_safe()
    s = status_of(ctl)
    if not s.safe:
        raise Fail(f"after make_safe() status reports drive_on={s.drive_on}, bias_v={s.bias_v:g}, z_m={s.z_m:g}")
    return "with the drive on (and a bias), make_safe() left status withdrawn, drive off, bias 0 V"


def abort_idle(kit: Kit) -> str:
    ctl = kit.controller
    t = Timer()
    ctl.abort()
    ctl.abort()
    took = t()
    if took > 2 * ABORT_LIMIT_S:
        raise Fail(f"two abort() calls on an idle safe stage took {took * 1e3:.0f} ms")
    if not status_of(ctl).safe:
        raise Fail("after abort() on an idle stage status is not safe")
    ctl.set_drive(*drive_point(ctl, kit.notes))  # and the stage still works afterwards
    ctl.drive_off()
    return f"abort() twice on an idle safe stage took {took * 1e3:.1f} ms; the stage works afterwards"


def abort_sweep(kit: Kit) -> str:
    ctl = kit.controller
    if not ctl.has(Capability.DRIVE_SWEEP):
        raise NotApplicable
    f0, a = drive_point(ctl, kit.notes)
    settle = 5e-3
    freqs = _around(ctl, f0, 120)
    return abort_during(ctl, lambda: ctl.sweep(freqs, a, settle_s=settle), "sweep",
                        freqs.size * settle).judge(ctl)


def abort_record(kit: Kit) -> str:
    ctl = kit.controller
    if not ctl.has(Capability.THERMAL_RECORD):
        raise NotApplicable
    rate = min(1e5, ctl.limits.sample_rate_max_hz)
    samples = int(0.6 * rate)
    return abort_during(ctl, lambda: ctl.record_deflection(samples, rate, chunk=max(1, samples // 16)),
                        "deflection record", samples / rate).judge(ctl)


SIGNALS = [("signals.start_safe", start_safe), ("signals.read", read), ("signals.drive", drive),
           ("signals.lockin", lockin), ("signals.thermal_record", thermal_record), ("signals.sweep", sweep),
           ("signals.capabilities_declared", declared), ("signals.capabilities_undeclared", undeclared),
           ("safety.bias_limit", bias_limit), ("safety.drive_limits", drive_limits),
           ("safety.sweep_limits", sweep_limits), ("safety.sample_rate_limit", sample_rate_limit),
           ("safety.z_limit_low", z_limit_low), ("safety.nonfinite", nonfinite),
           ("safety.withdraw_twice", withdraw_twice), ("safety.drive_off_twice", drive_off_twice),
           ("safety.make_safe", make_safe), ("safety.abort_idle", abort_idle), ("safety.abort_sweep", abort_sweep),
           ("safety.abort_record", abort_record)]
