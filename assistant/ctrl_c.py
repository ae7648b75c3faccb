"""Ctrl-C held off for a short block that must not be cut (standard library only).

:func:`held` swaps the Python-level SIGINT handler for the block rather than blocking the signal: a blocked
SIGINT is delivered to another thread of the process, and Python still raises in the main one. Only the main
thread handles signals in Python, so elsewhere nothing is held.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Iterator


@contextlib.contextmanager
def held(*, deliver_after: bool) -> Iterator[None]:
    """Ctrl-C during the block does not interrupt it; with ``deliver_after`` a Ctrl-C that came is handed, when
    the block ends, to the handler that was there before (raised again for a handler outside Python's reach:
    ignored or the default), else it is dropped. A handler installed outside Python cannot be put back, so
    under one nothing is held."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.getsignal(signal.SIGINT)
    if previous is None:
        yield
        return
    pending: list[object] = []
    signal.signal(signal.SIGINT, lambda signum, frame: pending.append(frame))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        if pending and deliver_after:
            if callable(previous):
                previous(signal.SIGINT, pending[-1])
            else:
                signal.raise_signal(signal.SIGINT)
