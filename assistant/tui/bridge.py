"""Between the procedures (worker threads) and the UI thread: messages, the event sink, a serialised controller.

The controller interface is synchronous and "one caller at a time". The app talks to it from three places
(the running procedure, the status poller and the withdraw key), so every call goes through
:class:`SerialisedController`, which holds one re-entrant lock per call, except ``abort()``: the interface
allows it from any thread while a call is in flight, so the withdraw key does not wait for the call in
progress (a scan line) but stops it. The cancel token is set as well, and the stopped procedure's safety
guard confirms the safe state.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from textual.message import Message

from assistant.procedures.events import Event


class ProcedureEvent(Message):
    """A Progress or Notice from a procedure, carried to the UI thread."""

    def __init__(self, event: Event) -> None:
        super().__init__()
        self.event = event


class StepFinished(Message):
    """A workflow step ended: ``result`` on success, ``error`` otherwise (a Cancelled error for a cancel)."""

    def __init__(self, step: str, result: Any = None, error: BaseException | None = None) -> None:
        super().__init__()
        self.step, self.result, self.error = step, result, error


class StatusChanged(Message):
    """A fresh ``controller.status()`` snapshot (None: the controller did not answer)."""

    def __init__(self, status: Any, error: str | None = None) -> None:
        super().__init__()
        self.status, self.error = status, error


class WithdrawDone(Message):
    """The withdraw key's make-safe finished; ``safe`` is the confirmed state from ``status()`` (and, with a
    magnet, a field reading within 1 % of its range of 0)."""

    def __init__(self, safe: bool | None, error: str | None = None) -> None:
        super().__init__()
        self.safe, self.error = safe, error


@dataclass
class MessageSink:
    """A procedure sink that posts every event to a Textual message pump (thread-safe and cheap)."""

    target: Any  # an App or Widget

    def __call__(self, event: Event) -> None:
        self.target.post_message(ProcedureEvent(event))


class SerialisedController:
    """Wrap a controller so that each method call holds one shared lock; attributes pass through.

    ``try_status(timeout_s)`` gives up instead of queueing behind a long call, for the poller.
    """

    def __init__(self, controller: Any) -> None:
        object.__setattr__(self, "_inner", controller)
        object.__setattr__(self, "_lock", threading.RLock())

    @property
    def inner(self) -> Any:
        return self._inner

    def __getattr__(self, name: str) -> Any:
        value = getattr(self._inner, name)
        if not callable(value):
            return value
        lock = self._lock

        def locked(*args, **kwargs):
            with lock:
                out = value(*args, **kwargs)
            if isinstance(out, Iterator):  # e.g. record_deflection: hold the lock per chunk, not per record
                return _locked_iter(out, lock)
            return out

        locked.__name__ = name
        return locked

    def abort(self) -> None:
        """Straight to the controller, without the lock: it stops the call that holds the lock."""
        self._inner.abort()

    def try_status(self, timeout_s: float):
        if not self._lock.acquire(timeout=timeout_s):
            return None
        try:
            return self._inner.status()
        finally:
            self._lock.release()


def _locked_iter(it: Iterator, lock) -> Iterator:
    while True:
        with lock:
            try:
                item = next(it)
            except StopIteration:
                return
        yield item
