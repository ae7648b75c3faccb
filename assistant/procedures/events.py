"""Progress events and cancellation: the one vocabulary every long operation reports in.

Procedures call ``sink(Progress(...))`` or ``sink(Notice(...))``; the CLI renders them on stderr, the TUI
turns them into messages. A procedure checks ``cancel.raise_if_set()`` between steps.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from assistant.errors import AssistantError


@dataclass(frozen=True)
class Progress:
    """``done`` of ``total`` ``unit`` of the task ``what``; times in seconds of wall clock (None if unknown)."""

    what: str
    done: float
    total: float | None
    unit: str
    elapsed_s: float
    remaining_s: float | None = None
    data: dict[str, Any] = field(default_factory=dict)  # optional payload for live views (a spectrum, a line)


@dataclass(frozen=True)
class Notice:
    """A message for the user: level is "info", "warning" or "error". ``kind`` marks a notice a renderer may
    shorten: "stopped" is the safety guard's report that it made the stage safe after an error (whose text the
    caller reports anyway)."""

    level: str
    text: str
    kind: str = ""


Event = Progress | Notice
Sink = Callable[[Event], None]


def null_sink(event: Event) -> None:
    """A sink that discards everything."""


class Cancelled(AssistantError):
    """Raised inside a procedure when its cancel token was set."""


class CancelToken:
    """Thread-safe cancel flag polled by procedures between steps."""

    def __init__(self) -> None:
        self._event = threading.Event()

    def set(self) -> None:
        self._event.set()

    def is_set(self) -> bool:
        return self._event.is_set()

    def raise_if_set(self) -> None:
        if self._event.is_set():
            raise Cancelled("cancelled by the user")
