"""The runner of the conformance kit: levels, checks, confirmation before motion, and the stage left safe.

A check is a function ``check(kit) -> str`` that returns one sentence of evidence when the promise holds and
raises :class:`Fail` (with the sentence that shows it broken) when it does not, or :class:`Halt` when the
stage may still be moving afterwards (a call that abort() did not stop), which ends the run; :class:`NotApplicable`
leaves it out of the result (a watchdog check on a controller that is not behind a link). Any other exception fails
the check with the exception named, and the stage is made safe before the next check runs.
"""

from __future__ import annotations

import gc
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field

from drivers.base import Capability, Controller, safe_steps

#: The levels, each including the ones before it. Nothing moves below ``motion``; nothing approaches a surface
#: below ``engaged``.
LEVELS = ("identity", "signals", "motion", "engaged")

#: What the kit will do at each level that moves anything; shown (and confirmed) before the level runs.
PLANS = {
    "motion": ("move the Z piezo between 0 and at most a fifth of its range at the speed limit (and withdraw during a"
               " move), move the scanner by at most 1 µm from the centre, step the coarse motor a few steps towards "
               "the sample and back, and start a move of half a Z range towards it that abort() stops. Then ask for a"
               " force curve beyond the Z range, a line with a second pass beyond the bias limit and a coarse move of"
               " twice the whole travel: the driver must refuse each before anything moves (a driver that does not is"
               " stopped with abort() within 0.2 s, the coarse motor before it could have gone half a Z range; a "
               "force curve may have extended Z by up to its whole range by then). The tip must be well clear of the "
               "surface: at least one Z range plus 1 µm. Nothing approaches the surface. With a magnet "
               "(applied_field): apply a field of 5 % of its range, at most 40 kA/m (50 mT), bring it back to 0 with "
               "make_safe(), then apply it with the opposite sign and abort() the ramp back through 0; keep magnetic "
               "media and delicate samples away."),
    "engaged": ("approach the surface under amplitude feedback (coarse steps no longer than the Z range just "
                "searched), scan one short line with two second passes at a safe lift height, a second with its "
                "passes biased at +0.5 and -0.5 V (at most half the bias limit; the first pass stays at 0 V), stop a "
                "third in the middle with abort(), and over a link stay silent until the server's watchdog acts. "
                "The tip touches the surface in tapping contact; use a sample and a tip you can spare."),
}

ABORT_LIMIT_S = 0.2  # abort() must return within this [s] (plus a magnet's ramp to 0 when a field is on)
#: A magnet's field counts as 0 within this fraction of its range (the server's watchdog uses the same threshold)
FIELD_ZERO_FRACTION = 0.01


class Fail(Exception):
    """A broken promise; the message is the evidence."""


class Halt(Fail):
    """A broken promise after which nothing more may run: the stage may still be moving."""


class NotApplicable(Exception):
    """The check does not apply to this controller."""


@dataclass(frozen=True)
class Check:
    name: str
    level: str
    passed: bool
    detail: str


@dataclass
class KitResult:
    url: str | None
    level: str
    checks: list[Check] = field(default_factory=list)
    stopped: str | None = None  # why a level that was asked for did not run

    @property
    def passed(self) -> bool:
        return self.stopped is None and all(c.passed for c in self.checks)

    def failed(self) -> list[str]:
        return [c.name for c in self.checks if not c.passed]

    def to_dict(self) -> dict:
        return {"passed": self.passed, "url": self.url, "level": self.level, "stopped": self.stopped,
                "checks": [asdict(c) for c in self.checks]}


@dataclass
class Kit:
    """What a check gets: the controller, its URL (if known) and a place for shared findings."""

    controller: Controller
    url: str | None = None
    notes: dict = field(default_factory=dict)  # e.g. the drive frequency found at one level for the next

    def settle(self) -> None:
        """Leave the stage safe between checks (the kit's own guard)."""
        make_safe(self.controller)


def make_safe(ctl: Controller) -> list[str]:
    """Stop and make safe by every route there is: abort(), then each safe step alone, and a field still on set
    to 0 directly. Returns the failures."""
    try:
        ctl.abort()
        problems: list[str] = []
    except Exception:  # try each step on its own, and report those
        problems = []
        for step, what in zip(safe_steps(ctl), ("withdraw", "drive off", "bias 0 V", "field 0")):
            try:
                step()
            except Exception as exc:
                problems.append(f"{what}: {type(exc).__name__}: {exc}")
    try:
        if field_left_on(ctl) is not None:  # a driver whose make-safe forgets its magnet: the kit's last resort
            ctl.set_field(0.0)
            left = field_left_on(ctl)
            if left is not None:
                problems.append(f"field 0: set_field(0) left the field reading {left:g} A/m")
    except Exception as exc:
        problems.append(f"field 0: {type(exc).__name__}: {exc}")
    return problems


def field_tolerance_a_per_m(ctl: Controller) -> float:
    """How far from its target a magnet's reading may be [A/m]: 1 % of its range."""
    return FIELD_ZERO_FRACTION * ctl.limits.field_max_a_per_m


def field_left_on(ctl: Controller) -> float | None:
    """The field a declared magnet reads [A/m] if it is not 0 (within :func:`field_tolerance_a_per_m`); None
    when it is 0 or there is no magnet."""
    if not ctl.has(Capability.APPLIED_FIELD):
        return None
    field_a_per_m = float(ctl.read_field())
    return None if abs(field_a_per_m) <= field_tolerance_a_per_m(ctl) else field_a_per_m


def run_level_checks(kit: Kit, level: str, checks: list[tuple[str, Callable[[Kit], str]]], result: KitResult,
                     progress: Callable[[Check], None]) -> bool:
    """Run one level's checks; after a failure that acted on the stage, make it safe. False (and
    ``result.stopped`` set) when the stage could not be made safe: nothing more may run."""
    passive = level == "identity"
    for name, fn in checks:
        try:
            check = Check(name, level, True, _sentence(fn(kit)))
        except NotApplicable:
            continue
        except Halt as exc:
            check = Check(name, level, False, _sentence(str(exc)))
            result.checks.append(check)
            progress(check)
            make_safe(kit.controller)
            result.stopped = (f"after {name} the stage may still be moving; the kit stopped: check the instrument "
                              f"by hand")
            return False
        except Fail as exc:
            check = Check(name, level, False, _sentence(str(exc)))
        except Exception as exc:  # an exception the interface does not allow there
            check = Check(name, level, False, _sentence(f"raised {type(exc).__name__}: {exc}"))
        except BaseException:  # Ctrl-C: safe first, then stop
            make_safe(kit.controller)
            raise
        result.checks.append(check)
        progress(check)
        if not check.passed and not passive:
            problems = make_safe(kit.controller)
            if kit.notes.get("engaged"):  # the checks after it that need the tip on the surface say why they cannot
                kit.notes.update(engaged=False, withdrawn_after=name)
            if problems:
                result.stopped = (f"after {name} the stage could not be made safe ({'; '.join(problems)}); "
                                  f"the kit stopped: check the instrument by hand")
                return False
    return True


def run(controller: Controller, *, level: str = "signals", url: str | None = None,
        confirm: Callable[[str, str], bool] | None = None,
        progress: Callable[[Check], None] | None = None) -> KitResult:
    """Run the checks of ``level`` and every level before it against ``controller``; the stage ends safe.

    ``confirm(level, plan)`` is asked before each level that moves anything (``motion``, ``engaged``); without
    it those levels do not run. ``progress`` sees each check as it finishes.
    """
    from drivers.conformance import checks_engaged, checks_field, checks_identity, checks_motion, checks_signals

    if level not in LEVELS:
        raise ValueError(f"level {level!r} is not one of {', '.join(LEVELS)}")
    groups = {"identity": checks_identity.IDENTITY, "signals": checks_signals.SIGNALS + checks_field.SIGNALS,
              "motion": checks_motion.MOTION + checks_field.MOTION, "engaged": checks_engaged.ENGAGED}
    result = KitResult(url, level)
    kit = Kit(controller, url)
    progress = progress or (lambda check: None)
    last = LEVELS[0]
    try:
        for lv in LEVELS[: LEVELS.index(level) + 1]:
            if lv in PLANS and not (confirm is not None and confirm(lv, PLANS[lv])):
                result.stopped = f"the {lv} level was not confirmed; it and the levels after it did not run"
                break
            last = lv
            if not run_level_checks(kit, lv, groups[lv], result, progress):
                break
    finally:
        final = _end_safe(controller, last)
        result.checks.append(final)
        progress(final)
    return result


def _end_safe(ctl: Controller, level: str) -> Check:
    problems = make_safe(ctl)
    try:
        s = ctl.status()
        field = field_left_on(ctl)
    except Exception as exc:
        return Check("end.safe", level, False, _sentence(f"status() or read_field() raised {type(exc).__name__} "
                                                         f"({exc}) after making the stage safe: check the "
                                                         f"instrument by hand"))
    if problems or not s.safe or field is not None:
        why = "; ".join(problems) or (f"status reports engaged={s.engaged}, feedback_on={s.feedback_on}, "
                                      f"z_m={s.z_m:g}, drive_on={s.drive_on}, bias_v={s.bias_v:g}, and the "
                                      f"field reads {field or 0.0:g} A/m")
        return Check("end.safe", level, False, _sentence(f"the stage did not end safe: {why}"))
    if ctl.has(Capability.APPLIED_FIELD):
        return Check("end.safe", level, True, "The stage ended withdrawn, with the drive off, the bias at 0 V "
                                              "(confirmed by status()) and the field at 0 (read_field()).")
    return Check("end.safe", level, True, "The stage ended withdrawn, with the drive off and the bias at 0 V "
                                          "(confirmed by status()).")


def _sentence(text: str) -> str:
    text = " ".join(str(text).split())
    if not text:
        return "no detail."
    return text if text.endswith((".", "!", "?")) else text + "."


def quiet_heap() -> None:
    """Collect the calling process's garbage now, before a timed abort, so that a full collection of its heap
    does not fall inside the measurement and count against the driver (measured: 113 ms in a test process that
    had run 372 tests; one link check once took 231 ms for an abort that takes 6 ms)."""
    gc.collect()


class Timer:
    """Wall-clock seconds since it was made (the heap collected first: :func:`quiet_heap`)."""

    def __init__(self) -> None:
        quiet_heap()
        self.t0 = time.monotonic()

    def __call__(self) -> float:
        return time.monotonic() - self.t0
