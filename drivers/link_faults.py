"""Faults that are not physics: the link faults the server applies to its replies, and the full disk of the
writing side. Both follow a :class:`~drivers.fault_plan.FaultPlan` (each with its own random stream)."""

from __future__ import annotations

import errno
import logging
import time
from collections.abc import Callable

from drivers.fault_plan import LINK_KINDS, WRITER_KINDS, Fault, FaultPlan, FaultSchedule

log = logging.getLogger(__name__)

__all__ = ["LinkFaults", "DiskGate", "gate_for"]


class LinkFaults:
    """The link-level faults of a plan, as a server applies them: drop a request, hold or delay a reply, mangle
    its bytes. ``clock`` times a link drop."""

    def __init__(self, plan: FaultPlan | None, clock: Callable[[], float]) -> None:
        self.schedule: FaultSchedule | None = plan.schedule(LINK_KINDS, stream=1) if plan else None
        self.clock = clock
        self.dead_until = -1.0

    def dead(self) -> bool:
        return self.clock() < self.dead_until

    def draw(self) -> list[Fault]:
        """The faults of this request; a ``link_drop`` starts a dead time."""
        if self.schedule is None:
            return []
        faults = self.schedule.next_call()
        for f in faults:
            log.info("injecting link fault %s", f.kind)
            if f.kind == "link_drop":
                self.dead_until = self.clock() + f.duration_s
        return faults

    @staticmethod
    def drops(faults: list[Fault]) -> bool:
        """Whether the request is lost before it runs."""
        return any(f.kind == "link_drop" for f in faults)

    @staticmethod
    def hold_reply(faults: list[Fault]) -> bool:
        """Whether a reply must not be sent (lost) and, as a side effect, wait out any delay."""
        for f in faults:
            if f.kind == "delay":
                time.sleep(f.delay_s)  # a real link: the client is waiting on the wall clock
        return any(f.kind in ("timeout", "link_drop") for f in faults)

    def mangle(self, data: bytes, faults: list[Fault]) -> bytes:
        """The reply's bytes as a corrupting or truncating link delivers them."""
        for f in faults:
            if f.kind == "corrupt_reply" and data:
                assert self.schedule is not None
                buf = bytearray(data)
                where = self.schedule.rng.integers(0, len(buf), size=min(f.flip_bytes, len(buf)))
                for i in where:
                    buf[i] ^= int(self.schedule.rng.integers(1, 256))
                data = bytes(buf)
            elif f.kind == "truncated_reply":
                data = data[: len(data) // 2]
        return data


class DiskGate:
    """The writing side's disk: call :meth:`check` before each write; a ``disk_full`` fault raises ENOSPC."""

    def __init__(self, schedule: FaultSchedule) -> None:
        self._schedule = schedule
        self.full = False

    def check(self, nbytes: int = 0) -> None:
        if any(f.kind == "disk_full" for f in self._schedule.next_call("write")):
            self.full = True
        if self.full:
            raise OSError(errno.ENOSPC, f"No space left on device (injected; write of {nbytes} bytes)")


def gate_for(plan: FaultPlan) -> DiskGate:
    """A disk gate driven by the ``disk_full`` faults of ``plan``."""
    return DiskGate(plan.schedule(WRITER_KINDS, stream=2))

