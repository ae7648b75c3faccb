"""The serial-style byte-stream transport of the server: a new pseudo-terminal, or a loopback TCP socket for
pyserial's ``socket://`` URLs. One SCPI line per request; bad lines are answered through the error queue. The
lines run in order in a worker thread (:mod:`.inflight`) that writes the replies; a line that begins with ``ABORt``
first stops the command in flight, here in the reading loop."""

from __future__ import annotations

import functools
import logging
import os
import select
import socket
import threading
import time
import tty
from collections.abc import Callable
from urllib.parse import urlsplit

from drivers.errors import ControllerError, InsecureBind
from drivers.link_faults import LinkFaults
from drivers.registry import is_loopback
from drivers.server import inflight
from drivers.server.dispatch import Dispatcher, Session
from drivers.wire.scpi import MAX_LINE, WireError

log = logging.getLogger(__name__)

__all__ = ["serve_stream"]


def serve_stream(d: Dispatcher, lf: LinkFaults, bind: str | None, announce: Callable[[dict], None],
                  stop: threading.Event, poll_s: float) -> None:
    listener = None
    if bind is None:
        master, slave = os.openpty()
        tty.setraw(slave)  # no echo, no line editing: the bytes pass as sent
        os.set_blocking(master, False)
        announce({"port": os.ttyname(slave)})
        conn_fd: int | None = master
        keep = [master, slave]  # the slave end stays open, else reads on the master fail once a client leaves
    else:
        parts = urlsplit(bind if "://" in bind else f"tcp://{bind}")
        host, port = parts.hostname or "127.0.0.1", parts.port or 0
        if parts.scheme != "tcp" or not is_loopback(host):
            raise InsecureBind(f"a serial-style stream listens on loopback only (tcp://127.0.0.1:PORT), not {bind}")
        listener = socket.create_server((host, port), family=socket.AF_INET6 if ":" in host else socket.AF_INET)
        listener.setblocking(False)
        shown = f"[{host}]" if ":" in host else host
        announce({"port": f"socket://{shown}:{listener.getsockname()[1]}"})
        conn_fd, keep = None, []
        conn: socket.socket | None = None
    session = Session()
    buf = bytearray()
    discarding = False
    worker = inflight.Worker("stream-requests")
    try:
        while not stop.is_set():
            watch = [conn_fd] if conn_fd is not None else [listener.fileno()]  # type: ignore[union-attr]
            ready, _, _ = select.select(watch, [], [], poll_s)
            if listener is not None and conn_fd is None:
                if ready:
                    conn, _ = listener.accept()
                    conn.setblocking(False)
                    conn_fd = conn.fileno()
                    session, buf, discarding = Session(), bytearray(), False
                d.watchdog()
                continue
            if ready:
                try:
                    chunk = os.read(conn_fd, 65536)
                except (BlockingIOError, InterruptedError):
                    chunk = None
                except OSError:
                    chunk = b""
                if chunk == b"":  # peer gone (socket) or pty failure
                    if listener is None:
                        raise ControllerError("pseudo-terminal failed")
                    if worker.busy:  # nobody can take the reply of what runs: stop it
                        d.watch.abort("the client left during a command")
                        worker.wait_idle(10.0)
                    conn.close()  # type: ignore[union-attr]
                    conn_fd = None
                    continue
                if chunk:
                    d.activity()
                    buf += chunk
                    while True:
                        nl = buf.find(b"\n")
                        if nl < 0:
                            if len(buf) >= MAX_LINE and not discarding:
                                worker.submit(functools.partial(  # in turn with the lines before it
                                    session.errors.push_error,
                                    WireError(-363, f"line longer than {MAX_LINE - 1} bytes discarded")))
                                discarding = True
                            if discarding:
                                buf.clear()
                            break
                        line, buf = bytes(buf[:nl]), buf[nl + 1:]
                        if discarding:
                            discarding = False
                            continue
                        inflight.submit_line(d, worker, line, functools.partial(
                            _stream_line, d, lf, session, line, conn_fd))
            inflight.watch(d, worker)
    finally:
        inflight.stop_worker(d, worker, "the server is stopping")
        for fd in keep:
            os.close(fd)
        if listener is not None:
            if conn_fd is not None:
                conn.close()  # type: ignore[union-attr]
            listener.close()


def _stream_line(d: Dispatcher, lf: LinkFaults, session: Session, line: bytes, fd: int) -> None:
    if lf.dead() or not line.strip():
        return  # blank lines (a client's resynchronisation) do not count as requests
    faults = lf.draw()
    if lf.drops(faults):
        return
    reply = d.handle_line(line, session)
    if reply is None or lf.hold_reply(faults):
        return
    _write_all(fd, lf.mangle(reply, faults))


def _write_all(fd: int, data: bytes, timeout_s: float = 10.0) -> None:
    """Write everything or give up after ``timeout_s`` (a client that stopped reading must not block us)."""
    deadline = time.monotonic() + timeout_s
    view = memoryview(data)
    while view:
        left = deadline - time.monotonic()
        if left <= 0:
            log.warning("client not reading; %d reply bytes dropped", len(view))
            return
        _, writable, _ = select.select([], [fd], [], left)
        if not writable:
            continue
        try:
            n = os.write(fd, view)
        except (BlockingIOError, InterruptedError):
            continue
        except OSError:
            return
        view = view[n:]
