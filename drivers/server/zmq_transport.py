"""The ZeroMQ transport of the server: a ROUTER socket for REQ clients, JSON header frame plus raw array frames,
loopback by default and CURVE-encrypted with an allow list of client keys beyond it. Requests run in a worker
thread (:mod:`.inflight`) whose replies the loop sends through an outbox (only the loop touches the ROUTER
socket); an abort request, from any client socket, is answered by the loop at once, ahead of the command in
flight."""

from __future__ import annotations

import functools
import logging
import threading
from collections.abc import Callable
from urllib.parse import urlsplit

from drivers.errors import InsecureBind
from drivers.link_faults import LinkFaults
from drivers.registry import is_loopback
from drivers.server import inflight
from drivers.server.dispatch import Dispatcher
from drivers.wire import messages

log = logging.getLogger(__name__)

__all__ = ["serve_zmq", "MAX_MESSAGE"]

MAX_MESSAGE = 1 << 20  # largest network request accepted; larger ones drop the connection (ZMQ_MAXMSGSIZE)


def serve_zmq(d: Dispatcher, lf: LinkFaults, bind: str | None, server_key: str | None,
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
                session = _session_of(msg)
                d.activity(session)
                if not inflight.handle_zmq_abort(d, sock, msg):  # an abort goes ahead of the command in flight
                    worker.submit(functools.partial(_zmq_job, d, lf, outbox, msg, session))
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


def _zmq_job(d: Dispatcher, lf: LinkFaults, outbox, msg: list[bytes], session: str | None) -> None:
    _zmq_message(d, lf, outbox, msg)  # the outbox stands in for the socket: the loop sends the reply
    d.activity(session)  # a client waiting for a long command was not silent meanwhile


def _session_of(msg: list[bytes]) -> str | None:
    """The client's session token in a REQ envelope, if it can be read."""
    try:
        ids = messages.peek_ids(msg[msg.index(b"", 1) + 1:])
    except ValueError:
        return None
    return ids[0] if ids else None


def _zmq_message(d: Dispatcher, lf: LinkFaults, sock, msg: list[bytes]) -> None:
    try:
        split = msg.index(b"", 1)  # REQ clients put an empty delimiter after the routing id
    except ValueError:
        return  # not a REQ envelope: nothing sensible to answer
    envelope, frames = msg[: split + 1], msg[split + 1:]
    if lf.dead():
        return
    faults = lf.draw()
    if lf.drops(faults):
        return
    reply = d.handle_frames(frames)
    if lf.hold_reply(faults):
        return
    if any(f.kind in ("corrupt_reply", "truncated_reply") for f in faults):
        reply = [lf.mangle(reply[0], faults)] + ([] if any(f.kind == "truncated_reply" for f in faults)
                                                 else reply[1:])
    try:
        sock.send_multipart(envelope + reply, flags=1)  # zmq.NOBLOCK: a vanished peer must not block us
    except Exception:
        log.info("reply to a departed client dropped")
