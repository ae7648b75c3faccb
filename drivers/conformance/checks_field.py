"""Checks of the applied-field capability (an electromagnet under the sample).

``signals`` (no field is set): without ``applied_field`` a field other than 0 and a field reading are refused
with CapabilityMissing while a field of 0 is allowed; with it, both methods are implemented and fields just
beyond the magnet's limit or not finite are refused with LimitExceeded before anything is set (the field reads
what it read before). ``motion`` (asks first): setting a small field from 0 and back to 0 takes at least the
magnet's ramp and settling time each way; the field reads back and ``make_safe()`` brings it to 0; with
the opposite field on, an ``abort()`` during the ramp through 0 stops it (Aborted) and leaves the field at 0,
returning within its limit plus the magnet's ramp to 0.

The test field is 5 % of the magnet's range and at most 40 kA/m (50 mT): enough to read back on any magnet, small
next to the switching fields of most hard samples and tips (common practice, no source); the plan shown before the
level says so. A field counts as 0 within 1 % of the range (``kit.FIELD_ZERO_FRACTION``).
"""

from __future__ import annotations

import math

from drivers.base import Capability, Controller
from drivers.conformance.kit import (ABORT_LIMIT_S, Fail, Kit, NotApplicable, Timer, field_left_on,
                                     field_tolerance_a_per_m)
from drivers.conformance.trials import abort_during, capability_missing, refused, status_of
from drivers.wire.commands import ramp_s

TEST_FIELD_FRACTION = 0.05
RAMP_TOLERANCE = 0.1  # a ramp may look up to 10 % faster than the limit (clock granularity)
TEST_FIELD_MAX_A_PER_M = 40e3


def _magnet(ctl: Controller) -> None:
    if not ctl.has(Capability.APPLIED_FIELD):
        raise NotApplicable


def _test_field(ctl: Controller) -> float:
    return min(TEST_FIELD_FRACTION * ctl.limits.field_max_a_per_m, TEST_FIELD_MAX_A_PER_M)


def _reading(ctl: Controller) -> float:
    value = ctl.read_field()
    if not isinstance(value, float) or not math.isfinite(value):
        raise Fail(f"read_field() gave {value!r} ({type(value).__name__}), not a finite float in A/m")
    return value


def _kam(value_a_per_m: float) -> str:
    return f"{value_a_per_m / 1e3:.3g} kA/m"


def _expect_zero(ctl: Controller, after: str) -> str:
    left = field_left_on(ctl)
    if left is not None:
        raise Fail(f"after {after} the field reads {_kam(left)} (0 within {_kam(field_tolerance_a_per_m(ctl))})")
    s = status_of(ctl)
    if not s.safe:
        raise Fail(f"after {after} status is not safe (engaged={s.engaged}, z_m={s.z_m:g}, drive_on={s.drive_on}, "
                   f"bias_v={s.bias_v:g})")
    return f"the field read 0 within {_kam(field_tolerance_a_per_m(ctl))}"


def _field_on(ctl: Controller, sign: float = 1.0) -> float:
    """Set the test field (times ``sign``) and check that it reads back; returns it [A/m]."""
    target = sign * _test_field(ctl)
    ctl.set_field(target)
    got = _reading(ctl)
    if abs(got - target) > field_tolerance_a_per_m(ctl):
        raise Fail(f"after set_field({_kam(target)}) the field reads {_kam(got)} (not A/m? or not settled on return?)")
    return target


# ---- signals: nothing is set -----------------------------------------------------------------------------------

def undeclared(kit: Kit) -> str:
    ctl = kit.controller
    if ctl.has(Capability.APPLIED_FIELD):
        raise NotApplicable
    capability_missing(lambda: ctl.set_field(1e3), "set_field(1 kA/m) without applied_field")
    capability_missing(ctl.read_field, "read_field() without applied_field")
    ctl.set_field(0.0)  # always allowed: make_safe() relies on it
    return "no magnet declared: set_field(1 kA/m) and read_field() refused with CapabilityMissing, set_field(0) allowed"


def limits(kit: Kit) -> str:
    ctl = kit.controller
    _magnet(ctl)
    inherited = [m for m in ("set_field", "read_field") if getattr(type(ctl), m) is getattr(Controller, m)]
    if inherited:
        raise Fail(f"applied_field declared but not implemented (the interface's refusing method is inherited): "
                   f"{', '.join(inherited)}")
    lim = ctl.limits.field_max_a_per_m
    before = _reading(ctl)
    over = lim * (1 + 1e-3)
    for value in (over, -over, math.nan, math.inf, -math.inf):
        refused(lambda: ctl.set_field(value), f"set_field({value:g} A/m) beyond ±{lim:g} A/m or not finite")
    after = _reading(ctl)
    if abs(after - before) > field_tolerance_a_per_m(ctl):
        raise Fail(f"set_field beyond the limit was refused, yet the field went from {_kam(before)} to "
                   f"{_kam(after)} (set before the check, or clipped?)")
    return (f"fields just beyond ±{_kam(lim)} and NaN/±inf refused with LimitExceeded; the field stayed at "
            f"{_kam(after)}")


SIGNALS = [("field.capability_undeclared", undeclared), ("field.limits", limits)]


# ---- motion: a small field is set ------------------------------------------------------------------------------

def ramp_rate(kit: Kit) -> str:
    """``set_field`` ramps at no more than ``limits.field_ramp_a_per_m_per_s`` and waits ``field_settle_s``
    before it returns (a magnet stepped at once induces currents in the sample stage and jolts the field its
    elements see): from 0 to the test field and back, each call takes at least that time, less 10 % for the
    clock's granularity."""
    ctl = kit.controller
    _magnet(ctl)
    lim = ctl.limits
    said = []
    for start, target in ((0.0, _test_field(ctl)), (_test_field(ctl), 0.0)):
        least = (1 - RAMP_TOLERANCE) * ramp_s(lim, start, target)
        t = Timer()
        ctl.set_field(target)
        took = t()
        if took < least:
            raise Fail(f"set_field from {_kam(start)} to {_kam(target)} returned after {took * 1e3:.0f} ms; a ramp at "
                       f"{_kam(lim.field_ramp_a_per_m_per_s)}/s and {lim.field_settle_s * 1e3:g} ms settling take at "
                       f"least {least * 1e3:.0f} ms")
        said.append(f"{_kam(start)} to {_kam(target)} in {took * 1e3:.0f} ms")
    return (f"the field went {' and '.join(said)} (ramp limit {_kam(lim.field_ramp_a_per_m_per_s)}/s, settling "
            f"{lim.field_settle_s * 1e3:g} ms: at least {least * 1e3:.0f} ms each way)")


def make_safe(kit: Kit) -> str:
    ctl = kit.controller
    _magnet(ctl)
    target = _field_on(ctl)
    ctl.make_safe()
    return f"a field of {_kam(target)} read back; after make_safe() " + _expect_zero(ctl, "make_safe()")


def abort_ramp(kit: Kit) -> str:
    """With the field on, abort() during a ramp through 0 to the opposite field: the ramp stops (Aborted) and the
    field ends at 0, abort() returning within its limit plus the ramp to 0 from the test field."""
    ctl = kit.controller
    _magnet(ctl)
    start = _field_on(ctl, -1.0)
    target, lim = -start, ctl.limits
    nominal = ramp_s(lim, start, target)
    trial = abort_during(ctl, lambda: ctl.set_field(target), f"field ramp from {_kam(start)} to {_kam(target)}",
                         nominal, after_s=min(0.1, nominal / 2), limit_s=ABORT_LIMIT_S + ramp_s(lim, target, 0.0))
    return f"{_kam(start)} read back; " + trial.judge(ctl) + "; " + _expect_zero(ctl, "the abort")


MOTION = [("field.ramp_rate", ramp_rate), ("field.make_safe", make_safe), ("field.abort", abort_ramp)]
