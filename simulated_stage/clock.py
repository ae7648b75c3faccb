"""Virtual time for the simulated stage.

Every duration the virtual microscope spends (a Z move, a scan line, a thermal record) is handed to a clock.
In ``fast`` pace the clock only counts; in ``realtime`` pace it also sleeps so that virtual time never runs
ahead of the wall clock. Time the stage spends waiting for its caller (an idle server, a client computing
between two lines) is credited only up to ``max_credit_s``: the stage's own computing overlaps the duration of
the action it computes, but an idle minute does not let the next minute of scanning run at full speed. The wall
clock and the sleep function are injectable, so tests never sleep.
"""

from __future__ import annotations

import time
from collections.abc import Callable

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
    """

    def __init__(self, pace: str = "fast", *, monotonic: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], None] = time.sleep, max_credit_s: float = 0.25) -> None:
        if pace not in PACES:
            raise ValueError(f"pace = {pace!r} is not one of {PACES}")
        self.pace = pace
        self.max_credit_s = float(max_credit_s)
        self._monotonic = monotonic
        self._sleep = sleep
        self._now_s = 0.0
        self._wall_start = monotonic()

    @property
    def now_s(self) -> float:
        """Virtual time elapsed since the clock was made [s]."""
        return self._now_s

    def advance(self, seconds: float) -> None:
        """Let ``seconds`` of virtual time pass (in realtime pace, wait until the wall clock agrees)."""
        if not seconds >= 0.0:  # also catches NaN
            raise ValueError(f"time step = {seconds!r} s must be >= 0")
        if self.pace == "realtime":
            behind = (self._monotonic() - self._wall_start) - self._now_s
            if behind > self.max_credit_s:  # waited for the caller: forget all but the allowed credit
                self._wall_start += behind - self.max_credit_s
        self._now_s += seconds
        if self.pace == "realtime":
            lag = self._now_s - (self._monotonic() - self._wall_start)
            if lag > 0.0:
                self._sleep(lag)
