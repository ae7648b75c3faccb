"""Virtual time for the simulated stage.

Every duration the virtual microscope spends (a Z move, a scan line, a thermal record) is handed to a clock.
In ``fast`` pace the clock only counts; in ``realtime`` pace it also sleeps so that virtual time never runs
ahead of the wall clock. Time the stage spends waiting for its caller (an idle server, a client computing
between two lines) is credited only up to ``max_credit_s``: the stage's own computing overlaps the duration of
the action it computes, but an idle minute does not let the next minute of scanning run at full speed. The wall
clock and the sleep function are injectable, so tests never sleep.

Another thread may :meth:`VirtualClock.interrupt` the action that is spending time: its next (or present)
:meth:`VirtualClock.advance` raises :class:`StageAborted` and virtual time stops where the action was
stopped, rounded up to the action's own step (a servo sample of a scan line, one point of a sweep).
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable

from simulated_stage.errors import StageAborted

PACES = ("fast", "realtime")


class VirtualClock:
    """Virtual time in seconds since the clock was made.

    Parameters
    ----------
    pace : {"fast", "realtime"}
        ``fast`` never waits; ``realtime`` sleeps in :meth:`advance` until the wall clock has caught up.
    monotonic, sleep : callables, optional
        Wall-clock source and sleep function (default :func:`time.monotonic`, :func:`time.sleep`).
    max_credit_s : float
        How far virtual time may fall behind the wall clock and then catch up without waiting [s].
    max_lag_s : float, optional
        In realtime pace, how far virtual time may stay behind the wall clock when an action begins
        (:meth:`begin`). None (default): no bound, so time the host lost earlier (computing, talking over a
        link) is caught up by later actions, which then take less than their duration. With a bound, each
        action takes its own duration (or its computing time, if longer): what a stage that is timed from
        outside must do.
    """

    def __init__(self, pace: str = "fast", *, monotonic: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], None] = time.sleep, max_credit_s: float = 0.25,
                 max_lag_s: float | None = None) -> None:
        if pace not in PACES:
            raise ValueError(f"pace = {pace!r} is not one of {PACES}")
        self.pace = pace
        self.max_credit_s = float(max_credit_s)
        self._monotonic = monotonic
        self._sleep = sleep
        self._now_s = 0.0
        self._wall_start = monotonic()
        self._interrupt = threading.Event()
        self.max_lag_s = max_lag_s

    @property
    def now_s(self) -> float:
        """Virtual time elapsed since the clock was made [s]."""
        return self._now_s

    def advance(self, seconds: float, *, step_s: float | None = None, interruptible: bool = True) -> None:
        """Let ``seconds`` of virtual time pass (in realtime pace, wait until the wall clock agrees).

        ``step_s`` is the granularity of the action: when it is interrupted, the time it spent is rounded up
        to whole steps. Raises :class:`StageAborted` if the clock is (or becomes) interrupted, unless
        ``interruptible`` is False (a withdraw: what an interruption wants done).
        """
        if not seconds >= 0.0:  # also catches NaN
            raise ValueError(f"time step = {seconds!r} s must be >= 0")
        if interruptible and self._interrupt.is_set():
            raise StageAborted("stopped on request before it began")
        if self.pace == "realtime":
            behind = (self._monotonic() - self._wall_start) - self._now_s
            if behind > self.max_credit_s:  # waited for the caller: forget all but the allowed credit
                self._wall_start += behind - self.max_credit_s
        start = self._now_s
        self._now_s += seconds
        if self.pace != "realtime":
            return
        lag = self._now_s - (self._monotonic() - self._wall_start)
        if lag > 0.0:
            try:
                stopped = self._wait(lag) if interruptible else (self._sleep(lag), False)[1]
            except BaseException:  # Ctrl-C in the sleep: virtual time must not stay ahead of the wall clock
                self._stop_at(start, seconds, step_s)
                raise
            if stopped:
                spent = self._stop_at(start, seconds, step_s)
                raise StageAborted(f"stopped on request after {spent:.3g} s of {seconds:.3g} s")

    def begin(self) -> None:
        """An action begins: in realtime pace with ``max_lag_s``, forget wall-clock time lost before it."""
        if self.pace != "realtime" or self.max_lag_s is None:
            return
        behind = self._monotonic() - self._wall_start - self._now_s
        if behind > self.max_lag_s:
            self._wall_start += behind - self.max_lag_s

    def _wait(self, seconds: float) -> bool:
        """Sleep ``seconds``; True if interrupted meanwhile (at once with the real sleep)."""
        if self._sleep is time.sleep:
            return self._interrupt.wait(seconds)
        self._sleep(seconds)  # an injected sleep cannot be woken: look afterwards
        return self._interrupt.is_set()

    def _stop_at(self, start: float, seconds: float, step_s: float | None) -> float:
        spent = min(max(self._monotonic() - self._wall_start - start, 0.0), seconds)
        if step_s is not None and step_s > 0.0:
            spent = min(math.ceil(spent / step_s - 1e-9) * step_s, seconds)
        self._now_s = start + spent
        return spent

    def interrupt(self) -> None:
        """Stop the action spending time now (thread-safe); every advance raises until :meth:`resume`."""
        self._interrupt.set()

    def resume(self) -> None:
        """Let time pass again after :meth:`interrupt`."""
        self._interrupt.clear()

    @property
    def interrupted(self) -> bool:
        return self._interrupt.is_set()

    def set_pace(self, pace: str) -> None:
        """Switch pace; realtime then starts from the present moment (virtual time never jumps)."""
        if pace not in PACES:
            raise ValueError(f"pace = {pace!r} is not one of {PACES}")
        self.pace = pace
        self._wall_start = self._monotonic() - self._now_s
