"""A Ctrl-C is never lost between the start of a command and the first motion.

Python turns SIGINT into ``KeyboardInterrupt`` wherever the main thread happens to be. While a command imports
its libraries, that can be inside library code that catches the exception and carries on, and the run would then
go on to calibrate and approach although it was asked to stop (seen about once in a dozen Ctrl-C trials sent in
the first seconds of ``mfma run``). :func:`remember_interrupts` installs a handler that also sets a latch, and
the command checks the latch before each step that moves the stage.

A termination request (SIGTERM, or SIGHUP when the terminal closes) is handled as a Ctrl-C
(:func:`terminations_as_interrupts`, around every command). There is one way a Ctrl-C stops the stage:
``KeyboardInterrupt`` (raised by the handler or by a latch check) reaches
:func:`assistant.procedures.guard.stop_now`, which calls the controller's ``abort()``. Inside a step the step's
safety guard does it; between two steps (no guard running, e.g. the tip engaged after the approach)
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


#: termination requests: SIGTERM (``kill``, a shutdown) and SIGHUP (the terminal closed)
TERMINATIONS = tuple(s for s in (getattr(signal, "SIGTERM", None), getattr(signal, "SIGHUP", None)) if s is not None)


def _as_ctrl_c(signum, frame) -> None:
    """A termination request, handled as a Ctrl-C by whatever handles SIGINT now: the latch or Python's own raise
    ``KeyboardInterrupt``; a stop in progress holds it (``guard.stop_now``), as it holds a second Ctrl-C."""
    handler = signal.getsignal(signal.SIGINT)
    if callable(handler):
        handler(signal.SIGINT, frame)
        return
    raise KeyboardInterrupt  # Ctrl-C ignored (a background job) or not Python's: a termination still stops


@contextlib.contextmanager
def terminations_as_interrupts() -> Iterator[None]:
    """SIGTERM and SIGHUP stop a command the way Ctrl-C does, so the stage is made safe before the process ends.

    Python's default for both ends the process at once: an engaged tip stays engaged, with the drive on and the
    bias set (a served stage withdraws only when its watchdog notices the silence; a stage driven in-process not
    at all). Installed only over the default handlers and only in the main thread; put back on the way out.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    mine = [s for s in TERMINATIONS if signal.getsignal(s) is signal.SIG_DFL]
    for s in mine:
        signal.signal(s, _as_ctrl_c)
    try:
        yield
    finally:
        for s in mine:
            signal.signal(s, signal.SIG_DFL)


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
    """Any exception in the block stops the stage through ``abort()`` (withdrawn, drive off, bias 0 V, field 0)
    and goes on; a Ctrl-C (:func:`caused_by_ctrl_c`) leaves as ``KeyboardInterrupt`` (the command then exits
    130). A running step's guard has stopped the stage already, but not an error between two steps with the tip
    engaged: a session-file write after the approach or before a series (a full disk left the tip engaged, the
    feedback and the drive on). A stop that cannot be confirmed is said on stderr."""
    try:
        yield
    except BaseException as raised:
        from assistant.procedures.guard import stop_now

        ctrl_c = caused_by_ctrl_c(raised)
        leaving = raised if not ctrl_c or isinstance(raised, KeyboardInterrupt) else KeyboardInterrupt()
        try:
            stop_now(controller)
        except Exception as exc:
            import sys

            sys.stderr.write(f"mfma: could not confirm a safe stage ({exc}); check the instrument by hand\n")
        else:
            with contextlib.suppress(AttributeError):  # the command's last line may say so
                leaving.stage_made_safe = True
        if leaving is raised:
            raise
        raise leaving from raised
