"""Pieces the checks share: expecting a refusal, reading the state back, an abort during a long call, and a
minimal approach (the kit cannot use the assistant's procedures: drivers never import the assistant)."""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass

from drivers.base import Capability, Controller, Status
from drivers.conformance.kit import ABORT_LIMIT_S, Fail, Halt, quiet_heap
from drivers.errors import Aborted, CapabilityMissing, LimitExceeded


def refused(call: Callable[[], object], what: str, *, also: tuple[type, ...] = ()) -> str:
    """Call ``call`` (pulling one item if it returns an iterator); it must raise LimitExceeded (or ``also``).
    Returns the refusal's message."""
    try:
        out = call()
        if isinstance(out, Iterator):
            next(out, None)
    except LimitExceeded as exc:
        return str(exc)
    except also as exc:
        return f"{type(exc).__name__}: {exc}"
    except Exception as exc:
        raise Fail(f"{what} raised {type(exc).__name__} ({exc}) instead of LimitExceeded") from None
    raise Fail(f"{what} was accepted instead of refused with LimitExceeded")


def capability_missing(call: Callable[[], object], what: str) -> None:
    """``call`` must raise exactly CapabilityMissing, before doing anything."""
    try:
        out = call()
        if isinstance(out, Iterator):
            next(out, None)
    except CapabilityMissing:
        return
    except Exception as exc:
        raise Fail(f"{what} raised {type(exc).__name__} ({exc}) instead of CapabilityMissing") from None
    raise Fail(f"{what} worked although the capability is not declared")


def status_of(ctl: Controller) -> Status:
    s = ctl.status()
    if not isinstance(s, Status):
        raise Fail(f"status() returned {type(s).__name__}, not drivers.base.Status")
    return s


def z_move_refused(ctl: Controller, z: float, what: str) -> None:
    """``move_z(z)`` must be refused (``what`` says why it should be) and leave Z at 0, where the checks start."""
    refused(lambda: ctl.move_z(z), f"move_z({z:g} m) {what}")
    got = status_of(ctl).z_m
    if got != 0.0:
        raise Fail(f"move_z({z:g} m) was refused, yet status reports Z at {got:g} m (clipped?)")


def refused_at_once(ctl: Controller, call: Callable[[], object], what: str, *,
                    stop_after_s: float = ABORT_LIMIT_S, also: tuple[type, ...] = ()) -> str:
    """``call`` (one that would move the stage) must raise LimitExceeded. It runs in a thread; if it has not
    ended ``stop_after_s`` after it began, ``abort()`` stops it, so that a driver that accepted it moves for no
    longer than that. The verdict rests on the outcome, not the time: a refusal that arrives late still counts.
    ``also``: further exceptions that count as a refusal. Returns the refusal's message."""
    quiet_heap()
    box: dict = {}

    def target() -> None:
        try:
            box["outcome"] = call()
        except BaseException as exc:  # judged below, in the calling thread
            box["error"] = exc

    th = threading.Thread(target=target, name="conformance-refusal", daemon=True)
    t0 = time.monotonic()
    th.start()
    th.join(stop_after_s)
    stopped = th.is_alive()
    if stopped:
        ctl.abort()
        th.join(2.0)
    took = time.monotonic() - t0
    exc = box.get("error")
    if isinstance(exc, LimitExceeded):
        return str(exc)
    if also and isinstance(exc, also):
        return f"{type(exc).__name__}: {exc}"
    if th.is_alive():
        raise Halt(f"{what} was still running {took:.1f} s after it began, abort() notwithstanding")
    if stopped:
        raise Fail(f"{what} was accepted and ran until abort() stopped it after {stop_after_s * 1e3:.0f} ms "
                   f"({type(exc).__name__ if exc is not None else 'it returned normally'}), instead of being "
                   f"refused with LimitExceeded before moving")
    if exc is not None:
        raise Fail(f"{what} raised {type(exc).__name__} ({exc}) instead of LimitExceeded")
    raise Fail(f"{what} was accepted instead of refused with LimitExceeded (it returned after {took * 1e3:.0f} ms)")


def close(a: float, b: float, *, rel: float = 1e-6, abs_: float = 0.0) -> bool:
    return math.isfinite(a) and abs(a - b) <= max(abs_, rel * max(abs(a), abs(b)))


def drive_point(ctl: Controller, notes: dict) -> tuple[float, float]:
    """A drive frequency [Hz] and a small amplitude [V] for the checks: the probe's nominal resonance if the
    controller knows it, else the drive frequency it reports, else 75 kHz (a common MFM lever; no source)."""
    if "drive" in notes:
        return notes["drive"]
    lim = ctl.limits
    f = 0.0
    try:
        hint = ctl.probe_hint() or {}
        f = float(hint.get("resonance_hz", 0.0))
    except Exception:
        pass
    if not 0 < f <= lim.frequency_max_hz:
        f = float(status_of(ctl).drive_frequency_hz)
    if not 0 < f <= lim.frequency_max_hz:
        f = min(75e3, 0.5 * lim.frequency_max_hz)
    notes["drive"] = (f, 0.1 * lim.drive_max_v)
    return notes["drive"]


@dataclass
class AbortTrial:
    what: str
    nominal_s: float
    abort_s: float | None = None  # how long abort() took
    outcome: str = ""  # "aborted", "finished", "raised X", "running"
    after_abort_s: float | None = None  # when the call ended, counted from abort() returning
    early_s: float | None = None  # the call ended before the abort was sent, after this long
    limit_s: float = ABORT_LIMIT_S  # abort() must return within this (more when it must ramp a field to 0)

    def judge(self, ctl: Controller) -> str:
        """The evidence sentence; raises Fail for a broken promise."""
        if self.early_s is not None:
            raise Fail(f"the {self.what} (nominal {self.nominal_s:.2g} s) ended after {self.early_s * 1e3:.0f} ms, "
                       f"before abort() was sent: this stage keeps no wall-clock time (a simulated stage at fast "
                       f"pace?), so abort could not be checked")
        if self.abort_s is not None and self.abort_s > self.limit_s:
            raise Fail(f"abort() took {self.abort_s * 1e3:.0f} ms during the {self.what} (limit "
                       f"{self.limit_s * 1e3:.0f} ms)")
        if self.outcome == "running":
            raise Halt(f"the {self.what} was still running {self.after_abort_s:.1f} s after abort() returned")
        if self.outcome == "finished":
            raise Fail(f"the {self.what} returned normally {max(self.after_abort_s, 0.0) * 1e3:.0f} ms after abort() "
                       f"instead of raising Aborted")
        if self.outcome != "aborted":
            raise Fail(f"the {self.what} {self.outcome} after abort() instead of raising Aborted")
        s = status_of(ctl)
        if not s.safe:
            raise Fail(f"after abort() status is not safe (engaged={s.engaged}, z_m={s.z_m:g}, "
                       f"drive_on={s.drive_on}, bias_v={s.bias_v:g})")
        return (f"abort() returned in {self.abort_s * 1e3:.1f} ms during the {self.what} (nominal "
                f"{self.nominal_s:.2g} s), which raised Aborted {max(self.after_abort_s, 0) * 1e3:.0f} ms later; "
                f"status reports withdrawn, drive off, bias 0 V")


def abort_during(ctl: Controller, call: Callable[[], object], what: str, nominal_s: float, *,
                 after_s: float = 0.1, join_s: float = 2.0, limit_s: float = ABORT_LIMIT_S) -> AbortTrial:
    """Run ``call`` in a thread, call ``abort()`` from this one ``after_s`` later, and see what happened."""
    trial = AbortTrial(what, nominal_s, limit_s=limit_s)
    quiet_heap()
    box: dict = {}
    started = threading.Event()

    def target() -> None:
        started.set()
        t0 = time.monotonic()
        try:
            out = call()
            if isinstance(out, Iterator):
                for _ in out:
                    pass
            box["outcome"] = "finished"
        except Aborted:
            box["outcome"] = "aborted"
        except BaseException as exc:
            box["outcome"] = f"raised {type(exc).__name__} ({exc})"
        box["end"] = time.monotonic()
        box["took"] = box["end"] - t0

    th = threading.Thread(target=target, name="conformance-long-call", daemon=True)
    th.start()
    started.wait(2.0)
    th.join(after_s)
    if not th.is_alive():
        trial.early_s = box.get("took", 0.0)
        return trial
    t0 = time.monotonic()
    ctl.abort()
    t1 = time.monotonic()
    trial.abort_s = t1 - t0
    th.join(join_s)
    if th.is_alive():
        trial.outcome, trial.after_abort_s = "running", join_s
        th.join(max(nominal_s, 1.0) + 5.0)  # let it end before the next check talks to the controller
        return trial
    trial.outcome = box["outcome"]
    trial.after_abort_s = box["end"] - t1
    return trial


def engage(ctl: Controller, notes: dict, *, travel_max_m: float) -> str:
    """Approach under amplitude feedback: at each coarse position switch the feedback on; the surface is in
    reach when Z stops short of full extension; otherwise withdraw and step the coarse motor by 80 % of the Z
    range (shorter than the range just searched, so the surface cannot be stepped over)."""
    lim = ctl.limits
    f, a = drive_point(ctl, notes)
    ctl.set_drive(f, a)
    free = float(ctl.read(["amplitude_v"])["amplitude_v"])
    if not (math.isfinite(free) and free > 0):
        raise Fail(f"the free amplitude read {free!r} V at {f:g} Hz, {a:g} V: nothing to hold a setpoint on")
    setpoint = 0.7 * free
    notes["setpoint_v"] = setpoint
    travel, steps_per_move = 0.0, max(1, int(0.8 * lim.z_range_m / lim.coarse_step_m))
    for cycle in range(1, 1000):
        ctl.set_feedback(True, setpoint_v=setpoint)
        s = status_of(ctl)
        if s.engaged or (s.feedback_on and s.z_m < 0.995 * lim.z_range_m):
            if not s.engaged:
                raise Fail(f"Z stopped at {s.z_m * 1e6:.2f} µm with the feedback on, but status says not engaged")
            return (f"engaged after {cycle} feedback cycle(s) and {travel * 1e6:.1f} µm of coarse travel, Z at "
                    f"{s.z_m * 1e6:.2f} µm of {lim.z_range_m * 1e6:.1f} µm, setpoint {setpoint * 1e3:.1f} mV")
        ctl.set_feedback(False)
        ctl.withdraw()
        if not ctl.has(Capability.COARSE_MOTOR):
            raise Fail("the surface is not within the Z range and the controller has no coarse motor")
        if travel + steps_per_move * lim.coarse_step_m > travel_max_m:
            raise Fail(f"no surface within {travel_max_m * 1e6:.0f} µm of coarse travel")
        ctl.step_coarse(steps_per_move)
        travel += steps_per_move * lim.coarse_step_m
    raise Fail("no surface found in 1000 cycles")
