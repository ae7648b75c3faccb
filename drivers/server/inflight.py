"""The server's command in flight: a worker thread runs the requests, so the serving loop keeps reading its link
while a long command (a scan line, a sweep, a record) executes.

* An abort request (``ABORt``: on a stream, a line that starts with it; over ZeroMQ, a request from any socket)
  is handled at once by the loop, ahead of the command in flight: the controller's ``abort()`` stops that
  command, which then answers with the abort error, and makes the stage safe.
* The watchdog keeps running: a silent client with the tip near the surface is handled as before (but through
  ``abort()``), and a command that runs longer than its expected time plus the watchdog limit is aborted.
* Replies keep their order: on a stream the worker writes them itself, in the order the lines came; the reply
  to an abort line follows the reply of the command it stopped.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

from drivers.wire.commands import ramp_s

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class InFlight:
    """One command being executed: its spelling, when it started and when it is overdue (monotonic s)."""

    spelling: str
    started: float
    deadline: float | None


#: The client drivers' default wait per request beyond the command's expected time [s].
CLIENT_TIMEOUT_S = 2.0


class CommandWatch:
    """Knows the command in flight on a dispatcher and aborts it when it overruns (``overrun()``).

    Overdue means running longer than twice its expected time plus the clients' default timeout plus the
    watchdog limit: by then a client with default settings has long given up waiting and has been silent for the
    watchdog time; a slow instrument gets twice the table's estimate. A live client aborts a command it gave up
    on itself; this catches a command that hangs after its client is gone.
    """

    def __init__(self, controller, watchdog_s: float | None, clock: Callable[[], float]) -> None:
        self.controller = controller
        self.watchdog_s = watchdog_s
        self.clock = clock
        self.current: InFlight | None = None
        self._overdue_handled: InFlight | None = None
        self.aborts = 0
        self.done_ahead = False  # set by the worker while it runs an abort line the loop already carried out

    def begin(self, cmd, args: tuple, limits, session) -> None:
        expected = expected_s(cmd, args, limits, session)
        now = self.clock()
        deadline = (None if self.watchdog_s is None or expected is None
                    else now + 2.0 * expected + CLIENT_TIMEOUT_S + self.watchdog_s)
        self.current = InFlight(cmd.spelling, now, deadline)

    def end(self) -> None:
        self.current = None

    def abort(self, reason: str) -> bool:
        """The controller's abort, logged; never raises (for the watchdogs). True if it succeeded."""
        self.aborts += 1
        log.warning("abort: %s", reason)
        try:
            self.controller.abort()
        except Exception as exc:
            log.error("abort failed: %s: %s", type(exc).__name__, exc)
            return False
        return True

    def take_ahead(self) -> bool:
        """For the dispatcher about to run an ``ABORt``: True (once) if it leads a line whose abort the serving
        loop already carried out, so that the stage is made safe (and a field ramped to 0) once per request."""
        done, self.done_ahead = self.done_ahead, False
        return done

    def overrun(self) -> bool:
        """Abort the command in flight once if it is overdue. True if it did."""
        cur = self.current
        if cur is None or cur.deadline is None or cur is self._overdue_handled or self.clock() <= cur.deadline:
            return False
        self._overdue_handled = cur
        self.abort(f"{cur.spelling} has run {self.clock() - cur.started:.1f} s, far beyond its expected time "
                   f"(watchdog limit {self.watchdog_s:g} s)")
        return True


#: Commands that may ramp a magnet (a field change, or making the stage safe, which sets the field to 0).
_FIELD_RAMPS = ("MAGNet:FIELd", "SYSTem:SAFE", "FIELd:ZERO", "ABORt")


def expected_s(cmd, args: tuple, limits, session) -> float | None:
    """How long a command may take on the instrument [s]; None if unknown (no overrun watch)."""
    if cmd.header == "ACQuire:DEFLection:STARt":
        session.chunk_s = args[2] / args[1]  # the NEXT requests each take one chunk's time
        return 0.0
    if cmd.header == "ACQuire:DEFLection:NEXT":
        return getattr(session, "chunk_s", None)
    ramp = 0.0
    if cmd.header in _FIELD_RAMPS and not cmd.query:
        # where the field is now is not known here: allow the longest ramp, end to end (0 without a magnet)
        ramp = ramp_s(limits, -limits.field_max_a_per_m, limits.field_max_a_per_m)
    if cmd.expected_s is None:
        return ramp
    try:
        return float(cmd.expected_s(args, limits)) + ramp
    except Exception:
        return None


class Worker:
    """One thread that runs submitted jobs in order; ``busy`` while any is queued or running."""

    def __init__(self, name: str = "request-worker") -> None:
        self._jobs: queue.Queue = queue.Queue()
        self._lock = threading.Lock()
        self._pending = 0
        self._idle = threading.Event()
        self._idle.set()
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self._thread.start()

    @property
    def busy(self) -> bool:
        return not self._idle.is_set()

    def submit(self, job: Callable[[], None]) -> None:
        with self._lock:
            self._pending += 1
            self._idle.clear()
        self._jobs.put(job)

    def wait_idle(self, timeout_s: float | None = None) -> bool:
        return self._idle.wait(timeout_s)

    def close(self, timeout_s: float = 10.0) -> None:
        self._jobs.put(None)
        self._thread.join(timeout_s)

    def _run(self) -> None:
        while True:
            job = self._jobs.get()
            if job is None:
                return
            try:
                job()
            except BaseException as exc:  # a failed job must not stop the server
                log.error("request failed in the worker: %s: %s", type(exc).__name__, exc)
            finally:
                with self._lock:
                    self._pending -= 1
                    if self._pending == 0:
                        self._idle.set()


def watch(d, worker: Worker) -> None:
    """The serving loop's periodic check: overrun while a command runs, silence while none does."""
    if worker.busy:
        d.watch.overrun()
    else:
        d.watchdog()


def stop_worker(d, worker: Worker, reason: str) -> None:
    """Abort a command still running (its client can no longer get the reply), then end the worker."""
    if worker.busy:
        d.watch.abort(reason)
    worker.wait_idle(10.0)
    worker.close()


# ---- byte streams -----------------------------------------------------------------------------------------

def is_abort_line(line: bytes) -> bool:
    """Whether a request line begins with ``ABORt`` (either spelling, any case, an optional leading colon)."""
    head = line.split(b";", 1)[0].strip().lstrip(b":").upper()
    return head in (b"ABOR", b"ABORT")


def submit_line(d, worker: Worker, line: bytes, run: Callable[[], None]) -> None:
    """Queue a request line; an abort line first stops the command in flight, here and now."""
    # the queued line then only answers (errors, echo); after a failed abort its ABORt runs again and reports
    ahead = is_abort_line(line) and worker.busy and d.watch.abort("abort request")

    def job() -> None:
        d.watch.done_ahead = ahead  # only this worker runs lines, one at a time: the line's leading ABORt takes it
        try:
            run()
        finally:
            d.watch.done_ahead = False
        d.activity()  # a client waiting for a long command was not silent meanwhile

    worker.submit(job)


# ---- ZeroMQ -----------------------------------------------------------------------------------------------

class Outbox:
    """Hands replies from the worker to the loop, which alone may use the ROUTER socket.

    ``send_multipart`` looks like a socket's, so the existing message handler writes into it unchanged; the loop
    polls ``receiver`` and forwards with :meth:`forward`.
    """

    def __init__(self, ctx) -> None:
        import zmq

        address = f"inproc://mfma-outbox-{id(self):x}-{time.monotonic_ns()}"
        self.receiver = ctx.socket(zmq.PAIR)
        self.receiver.setsockopt(zmq.LINGER, 0)
        self.receiver.bind(address)
        self._sender = ctx.socket(zmq.PAIR)
        self._sender.setsockopt(zmq.LINGER, 0)
        self._sender.connect(address)
        self._lock = threading.Lock()

    def send_multipart(self, frames: list[bytes], flags: int = 0) -> None:
        with self._lock:
            self._sender.send_multipart(frames)

    def forward(self, sock) -> None:
        import zmq

        while True:
            try:
                frames = self.receiver.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            try:
                sock.send_multipart(frames, flags=zmq.NOBLOCK)  # a vanished peer must not block us
            except Exception:
                log.info("reply to a departed client dropped")

    def close(self) -> None:
        self._sender.close(0)
        self.receiver.close(0)


def handle_zmq_abort(d, sock, msg: list[bytes]) -> bool:
    """Answer an abort request at once (True), or leave the message to the worker (False)."""
    from drivers.wire import messages
    from drivers.wire.error_map import error_for

    try:
        split = msg.index(b"", 1)
        frames = msg[split + 1:]
        req = messages.decode_request(frames)
    except Exception:
        return False
    if req.command.header != "ABORt":
        return False
    d.activity(req.session)
    d.watch.aborts += 1
    log.warning("abort: abort request")
    try:
        d.controller.abort()
        reply = messages.encode_reply(req.command, messages.Reply(req.id, True, ()))
    except Exception as exc:
        code, message = error_for(exc)
        reply = messages.encode_reply(req.command, messages.Reply(req.id, False, code=code, message=message))
    try:
        sock.send_multipart(msg[: split + 1] + reply, flags=1)  # zmq.NOBLOCK
    except Exception:
        log.info("reply to a departed client dropped")
    return True
