"""Serve any Controller over a serial-style byte stream (a new pseudo-terminal, or a loopback TCP socket for
pyserial's ``socket://`` URLs) or over ZeroMQ.

The server is the instrument's last line of defence: it checks every argument against the controller's hard
limits itself, answers bad input through the error queue (stream) or an error reply (network) and keeps
serving, executes a retried network request once (request ids), makes the stage safe after any controller
fault, and runs a watchdog that withdraws the tip, switches the drive off and sets the bias to zero when a
client falls silent while the tip is near the surface. Secrets never appear in logs, replies or errors.
Requests run in a worker thread (``drivers.server_inflight``), so an abort request is handled ahead of a long
command in flight and the watchdog also aborts a command that overruns its expected time.
"""

from __future__ import annotations

import functools
import ipaddress
import logging
import os
import select
import socket
import threading
import time
import tty
from collections import OrderedDict
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from urllib.parse import urlsplit

import numpy as np

from drivers.base import Controller
from drivers import server_inflight as inflight
from drivers.errors import Aborted, CapabilityMissing, ControllerError, LimitExceeded
from drivers.wire import messages
from drivers.wire.commands import Command, check_limits, check_types, error_for, resolve
from drivers.wire.scpi import MAX_LINE, ErrorQueue, WireError, decode_params, encode_answer, split_line
from simulated_stage.faults import LINK_KINDS, Fault, FaultPlan, FaultSchedule

log = logging.getLogger(__name__)

MAX_MESSAGE = 1 << 20  # largest network request accepted; larger ones drop the connection (ZMQ_MAXMSGSIZE)
_SESSIONS = 64  # sessions remembered for deduplication
_REPLIES_PER_SESSION = 4


class InsecureBind(ControllerError, PermissionError):
    """Refusal to listen beyond loopback without CURVE keys."""


@dataclass
class _Session:
    errors: ErrorQueue = field(default_factory=ErrorQueue)
    replies: OrderedDict[int, list[bytes]] = field(default_factory=OrderedDict)
    deflection: Iterator[np.ndarray] | None = None


class Dispatcher:
    """Runs decoded commands on one controller: limits, capability, error mapping, safety reflex, watchdog."""

    def __init__(self, controller: Controller, *, watchdog_s: float | None = 5.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.controller = controller
        self.watchdog_s = watchdog_s
        self.clock = clock
        self.last_activity = clock()
        self._watchdog_armed = True
        self.watchdog_trips = 0
        self.sessions: OrderedDict[str, _Session] = OrderedDict()
        self.watch = inflight.CommandWatch(controller, watchdog_s, clock)  # the command in flight

    # ---- one command ---------------------------------------------------------------------------------
    def execute(self, cmd: Command, args: tuple, session: _Session) -> tuple:
        h = cmd.header
        if h == "*CLS":
            session.errors.clear()
            return ()
        if h == "*OPC":
            return (1,)
        if h == "SYSTem:ERRor":
            return session.errors.pop()
        if h == "SYSTem:ECHO":
            return (args[0],)
        if h == "SYSTem:WATChdog":  # the silence limit, 0 when the watchdog is off
            return (float(self.watchdog_s or 0.0),)
        c = self.controller
        if cmd.capability is not None and not c.has(cmd.capability):
            raise CapabilityMissing(f"{type(c).__name__} does not offer {cmd.capability.value}")
        check_limits(cmd, args, c.limits)
        self.watch.begin(cmd, args, c.limits, session)
        try:
            if h == "ACQuire:DEFLection:STARt":
                session.deflection = iter(c.record_deflection(args[0], args[1], chunk=args[2]))
                return ()
            if h == "ACQuire:DEFLection:NEXT":
                if session.deflection is None:
                    raise WireError(-221, "no deflection record started (ACQuire:DEFLection:STARt)")
                chunk = next(session.deflection, None)
                if chunk is None:
                    session.deflection = None
                    return (np.zeros(0, np.float32),)
                return (np.asarray(chunk, np.float32),)
            assert cmd.invoke is not None
            return cmd.invoke(c, args)
        except (LimitExceeded, CapabilityMissing, WireError, Aborted):
            raise  # refused before anything moved, or stopped by an abort that made the stage safe
        except Exception as exc:
            # A controller that failed mid-operation may have left the tip down or the drive on.
            log.warning("%s failed (%s); making the stage safe", cmd.spelling, type(exc).__name__)
            self.safe_stage()
            raise
        finally:
            self.watch.end()

    def safe_stage(self) -> None:
        try:
            self.controller.make_safe()
        except Exception as exc:  # report, keep serving: the next request may succeed
            log.error("making the stage safe failed: %s", type(exc).__name__)

    # ---- stream (SCPI line) -----------------------------------------------------------------------------
    def handle_line(self, line: bytes, session: _Session) -> bytes | None:
        """Run every command of a line; errors go to the queue. Returns the reply if any query answered."""
        try:
            parsed = split_line(line)
        except WireError as exc:
            session.errors.push_error(exc)
            return None
        answers: list[bytes] = []
        for pc in parsed:
            try:
                cmd = resolve(pc.header, pc.query)
                args = check_types(cmd, decode_params(tuple(p.kind for p in cmd.params), pc.params))
                fields = self.execute(cmd, args, session)
                if cmd.query:
                    answers.append(encode_answer(cmd.reply, fields))
            except Exception as exc:  # every failure is reported, none stops the server
                session.errors.push(*error_for(exc))
        return b";".join(answers) + b"\n" if answers else None

    # ---- network message ----------------------------------------------------------------------------
    def handle_frames(self, frames: list[bytes]) -> list[bytes]:
        ids = messages.peek_ids(frames)
        session = self._session(ids[0] if ids else "")
        if ids is not None and ids[1] in session.replies:
            log.info("request %d of a session repeated: answered from memory, not run again", ids[1])
            return session.replies[ids[1]]
        cmd = None
        try:
            req = messages.decode_request(frames)
            cmd = req.command
            fields = self.execute(cmd, req.args, session)
            out = messages.encode_reply(cmd, messages.Reply(req.id, True, fields))
        except Exception as exc:
            code, message = error_for(exc)
            session.errors.push(code, message)
            out = messages.encode_reply(cmd or _ANY, messages.Reply(ids[1] if ids else -1, False, code=code,
                                                                   message=message))
        if ids is not None:
            session.replies[ids[1]] = out
            while len(session.replies) > _REPLIES_PER_SESSION:
                session.replies.popitem(last=False)
        return out

    def _session(self, key: str) -> _Session:
        s = self.sessions.pop(key, None) or _Session()
        self.sessions[key] = s
        while len(self.sessions) > _SESSIONS:
            self.sessions.popitem(last=False)
        return s

    # ---- watchdog -----------------------------------------------------------------------------------
    def activity(self) -> None:
        self.last_activity = self.clock()
        self._watchdog_armed = True

    def watchdog(self) -> bool:
        """Withdraw, drive off, bias zero if the client is silent too long with the tip near the surface."""
        if self.watchdog_s is None or not self._watchdog_armed:
            return False
        silent = self.clock() - self.last_activity
        if silent <= self.watchdog_s:
            return False
        self._watchdog_armed = False  # once per silence
        try:
            s = self.controller.status()
            # Near the surface: engaged, or the feedback or the Z piezo could bring the tip down. A withdrawn
            # stage with the drive on (a client thinking between sweeps) is left alone.
            at_risk = s.engaged or s.feedback_on or s.z_m > 0.0
        except Exception:
            at_risk = True
        if not at_risk:
            return False
        self.watch.abort(f"watchdog: client silent for {silent:.2f} s (limit {self.watchdog_s:.2f} s) with the "
                         f"tip engaged; withdrawing, drive off, bias zero")
        self.watchdog_trips += 1
        return True


_ANY = Command("", False, (), (), False)


# ---- link-level faults --------------------------------------------------------------------------------

class _LinkFaults:
    def __init__(self, plan: FaultPlan | None, clock: Callable[[], float]) -> None:
        self.schedule: FaultSchedule | None = plan.schedule(LINK_KINDS, stream=1) if plan else None
        self.clock = clock
        self.dead_until = -1.0

    def dead(self) -> bool:
        return self.clock() < self.dead_until

    def draw(self) -> list[Fault]:
        if self.schedule is None:
            return []
        faults = self.schedule.next_call()
        for f in faults:
            log.info("injecting link fault %s", f.kind)
            if f.kind == "link_drop":
                self.dead_until = self.clock() + f.duration_s
        return faults

    def mangle(self, data: bytes, faults: list[Fault]) -> bytes:
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


def _hold_reply(faults: list[Fault]) -> bool:
    """Whether a reply must not be sent (lost) and, as a side effect, wait out any delay."""
    for f in faults:
        if f.kind == "delay":
            time.sleep(f.delay_s)  # a real link: the client is waiting on the wall clock
    return any(f.kind in ("timeout", "link_drop") for f in faults)


# ---- entry point --------------------------------------------------------------------------------------

def serve(controller: Controller, *, transport: str, bind: str | None = None, server_key: str | None = None,
          allow_dir: str | None = None, watchdog_s: float | None = 5.0, faults: FaultPlan | None = None,
          announce: Callable[[dict], None], stop: threading.Event | None = None,
          clock: Callable[[], float] = time.monotonic, poll_s: float = 0.02) -> None:
    """Serve ``controller`` until ``stop`` is set (or KeyboardInterrupt); the stage is made safe on the way out.

    transport "serial": ``bind`` None opens a pseudo-terminal and announces ``{"port": "/dev/pts/N"}``;
    ``bind="tcp://127.0.0.1:PORT"`` (port 0 = any) listens for pyserial ``socket://`` clients and announces
    ``{"port": "socket://127.0.0.1:PORT"}`` (loopback only: a raw stream has no encryption).
    transport "zmq": ``bind`` defaults to ``tcp://127.0.0.1:0``; announces ``{"endpoint": ...}``. Any
    non-loopback address needs ``server_key`` (a ``.key_secret`` file) and ``allow_dir`` (clients' ``.key``).
    ``watchdog_s`` None disables the watchdog; ``faults`` injects its link-level faults; ``clock`` times the
    watchdog and link drops; ``poll_s`` is how often the loop looks at the watchdog and ``stop``.
    Raises :class:`InsecureBind` (before listening) for a refused address, ``drivers.keys.KeyFileError``
    for unusable key files.
    """
    stop = stop or threading.Event()
    if faults is not None:
        others = sorted({f.kind for f in faults.faults} - LINK_KINDS)
        if others:
            log.warning("the server injects link faults only; %s must be injected by the stage "
                        "(simulated_stage.faults.FaultyStage)", ", ".join(others))
    dispatcher = Dispatcher(controller, watchdog_s=watchdog_s, clock=clock)
    link_faults = _LinkFaults(faults, clock)
    try:
        if transport == "serial":
            if server_key or allow_dir:
                raise InsecureBind("the serial transport has no encryption; CURVE keys apply to --transport zmq")
            _serve_stream(dispatcher, link_faults, bind, announce, stop, poll_s)
        elif transport == "zmq":
            _serve_zmq(dispatcher, link_faults, bind, server_key, allow_dir, announce, stop, poll_s)
        else:
            raise ValueError(f"transport {transport!r} is not 'serial' or 'zmq'")
    finally:
        dispatcher.safe_stage()


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def _serve_stream(d: Dispatcher, lf: _LinkFaults, bind: str | None, announce: Callable[[dict], None],
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
    session = _Session()
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
                    session, buf, discarding = _Session(), bytearray(), False
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


def _stream_line(d: Dispatcher, lf: _LinkFaults, session: _Session, line: bytes, fd: int) -> None:
    if lf.dead() or not line.strip():
        return  # blank lines (a client's resynchronisation) do not count as requests
    faults = lf.draw()
    if any(f.kind == "link_drop" for f in faults):
        return
    reply = d.handle_line(line, session)
    if reply is None or _hold_reply(faults):
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


def _serve_zmq(d: Dispatcher, lf: _LinkFaults, bind: str | None, server_key: str | None,
               allow_dir: str | None, announce: Callable[[dict], None], stop: threading.Event,
               poll_s: float) -> None:
    import zmq
    from zmq.auth.thread import ThreadAuthenticator

    from drivers import keys

    endpoint = bind or "tcp://127.0.0.1:0"
    if "://" not in endpoint:
        endpoint = f"tcp://{endpoint}"
    parts = urlsplit(endpoint)
    try:
        host, port = parts.hostname, parts.port
    except ValueError:
        host, port = None, None
    if parts.scheme != "tcp" or not host:
        raise ValueError(f"bind address {bind!r} is not tcp://HOST:PORT")
    curve = server_key is not None or allow_dir is not None
    if not is_loopback(host) and not curve:
        raise InsecureBind(f"refusing to listen on {host} without CURVE encryption and client keys: "
                           f"{keys.HOW_TO_MAKE_KEYS}")
    if curve and (server_key is None or allow_dir is None):
        raise InsecureBind("CURVE needs both a server secret key file and an allow directory of client keys")
    secret = public = None
    if curve:
        public, secret = keys.load_secret_key(server_key)  # type: ignore[arg-type]
        n_keys = keys.check_allow_dir(allow_dir)  # type: ignore[arg-type]
    ctx = zmq.Context()
    auth = None
    sock = None
    worker = outbox = None
    try:
        if curve:
            # Without an authenticator on this very context, CURVE would admit any client key pair.
            auth = ThreadAuthenticator(ctx)
            auth.start()
            auth.configure_curve(domain="*", location=str(allow_dir))
        sock = ctx.socket(zmq.ROUTER)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE)
        if ":" in host:
            sock.setsockopt(zmq.IPV6, 1)
        if curve:
            sock.curve_secretkey = secret
            sock.curve_publickey = public
            sock.curve_server = True
        sock.bind(f"tcp://{host}:{port or 0}" if ":" not in host else f"tcp://[{host}]:{port or 0}")
        actual = sock.getsockopt_string(zmq.LAST_ENDPOINT)
        log.info("serving on %s (%s)", actual, f"CURVE, {n_keys} client keys" if curve else "loopback, plain")
        announce({"endpoint": actual})
        worker, outbox = inflight.Worker("zmq-requests"), inflight.Outbox(ctx)
        poller = zmq.Poller()
        poller.register(sock, zmq.POLLIN)
        poller.register(outbox.receiver, zmq.POLLIN)
        while not stop.is_set():
            ready = dict(poller.poll(int(poll_s * 1000)))
            if outbox.receiver in ready:
                outbox.forward(sock)
            if sock in ready:
                msg = sock.recv_multipart()
                d.activity()
                if not inflight.handle_zmq_abort(d, sock, msg):  # an abort goes ahead of the command in flight
                    worker.submit(functools.partial(_zmq_job, d, lf, outbox, msg))
            inflight.watch(d, worker)
    finally:
        if worker is not None:
            inflight.stop_worker(d, worker, "the server is stopping")
            outbox.forward(sock)
            outbox.close()
        if sock is not None:
            sock.close(0)
        if auth is not None:
            auth.stop()
        ctx.term()


def _zmq_job(d: Dispatcher, lf: _LinkFaults, outbox, msg: list[bytes]) -> None:
    _zmq_message(d, lf, outbox, msg)  # the outbox stands in for the socket: the loop sends the reply
    d.activity()  # a client waiting for a long command was not silent meanwhile


def _zmq_message(d: Dispatcher, lf: _LinkFaults, sock, msg: list[bytes]) -> None:
    try:
        split = msg.index(b"", 1)  # REQ clients put an empty delimiter after the routing id
    except ValueError:
        return  # not a REQ envelope: nothing sensible to answer
    envelope, frames = msg[: split + 1], msg[split + 1:]
    if lf.dead():
        return
    faults = lf.draw()
    if any(f.kind == "link_drop" for f in faults):
        return
    reply = d.handle_frames(frames)
    if _hold_reply(faults):
        return
    if any(f.kind in ("corrupt_reply", "truncated_reply") for f in faults):
        reply = [lf.mangle(reply[0], faults)] + ([] if any(f.kind == "truncated_reply" for f in faults)
                                                 else reply[1:])
    try:
        sock.send_multipart(envelope + reply, flags=1)  # zmq.NOBLOCK: a vanished peer must not block us
    except Exception:
        log.info("reply to a departed client dropped")
