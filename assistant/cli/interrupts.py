"""A Ctrl-C is never lost between the start of a command and the first motion.

Python turns SIGINT into ``KeyboardInterrupt`` wherever the main thread happens to be. While a command imports
its libraries, that can be inside library code that catches the exception and carries on, and the run would then
go on to calibrate and approach although it was asked to stop (seen about once in a dozen Ctrl-C trials sent in
the first seconds of ``mfma run``). :func:`remember_interrupts` installs a handler that also sets a latch, and
the command checks the latch before each step that moves the stage.

There is one way a Ctrl-C stops the stage: ``KeyboardInterrupt`` (raised by the handler or by a latch check)
reaches :func:`assistant.procedures.guard.stop_now`, which calls the controller's ``abort()``. Inside a step the
step's safety guard does it; between two steps (no guard running, e.g. the tip engaged after the approach)
:func:`stop_on_interrupt` around everything done with the open controller does it.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Iterator


class InterruptLatch:
    """Set by SIGINT; :meth:`check` raises ``KeyboardInterrupt`` once it is set."""

    def __init__(self) -> None:
        self._event = threading.Event()

    def handler(self, signum, frame) -> None:
        self._event.set()
        raise KeyboardInterrupt

    def is_set(self) -> bool:
        return self._event.is_set()

    def check(self) -> None:
        if self._event.is_set():
            raise KeyboardInterrupt


@contextlib.contextmanager
def remember_interrupts() -> Iterator[InterruptLatch]:
    """Install the latching SIGINT handler for the block (only over Python's default one, and only in the main
    thread); the previous handler is restored on the way out."""
    latch = InterruptLatch()
    installed = (threading.current_thread() is threading.main_thread()
                 and signal.getsignal(signal.SIGINT) is signal.default_int_handler)
    if installed:
        signal.signal(signal.SIGINT, latch.handler)
    try:
        yield latch
    finally:
        if installed:
            signal.signal(signal.SIGINT, signal.default_int_handler)


def caused_by_ctrl_c(exc: BaseException | None) -> bool:
    """Whether ``exc`` is a Ctrl-C or came from one. A ``KeyboardInterrupt`` raised while compiled code runs can
    come back as another error with it as context: h5py's lock gave ``SystemError: ... returned a result with an
    exception set`` (seen once in the seeded kill trials, a Ctrl-C during the report)."""
    seen: set[int] = set()
    while exc is not None and id(exc) not in seen:
        if isinstance(exc, KeyboardInterrupt):
            return True
        seen.add(id(exc))
        exc = exc.__cause__ or exc.__context__
    return False


@contextlib.contextmanager
def stop_on_interrupt(controller) -> Iterator[None]:
    """A Ctrl-C anywhere in the block (:func:`caused_by_ctrl_c`) stops the stage through ``abort()`` and leaves as
    ``KeyboardInterrupt`` (the command then exits 130). A stop that cannot be confirmed is said on stderr."""
    try:
        yield
    except BaseException as raised:
        if not caused_by_ctrl_c(raised):
            raise
        from assistant.procedures.guard import stop_now

        interrupt = raised if isinstance(raised, KeyboardInterrupt) else KeyboardInterrupt()
        try:
            stop_now(controller)
            interrupt.stage_made_safe = True  # the command's last line may say so
        except Exception as exc:
            import sys

            sys.stderr.write(f"mfma: could not confirm a safe stage ({exc}); check the instrument by hand\n")
        if interrupt is raised:
            raise
        raise interrupt from raised
