"""Client driver for a controller served over ZeroMQ: ``zmq+tcp://host:port?server=PUB&client=SECRET``.

``server`` is the server's public key file (``NAME.key``), ``client`` this client's secret key file
(``NAME.key_secret``); both or neither. Without keys only loopback hosts are allowed. Options ``timeout``
(seconds per attempt, default 2) and ``retries`` (default 2, for commands safe to repeat).

A REQ socket with a deadline on every request: a REQ socket whose reply never came is unusable, so after a
timeout it is closed with linger 0 and a new one connects. Requests carry a session token and a counter;
a retry reuses the id and the server answers it from memory, so a retried motion runs once. A socket
monitor turns a vanished server or a refused CURVE handshake into :class:`LinkLost` at once.

``abort()`` may come from another thread while a command is in flight: it sends ``ABORt`` from a socket of its
own, and the server answers it ahead of the running command once the stage is safe.
"""

from __future__ import annotations

import itertools
import secrets
import threading
import time
from urllib.parse import urlsplit

import zmq

from drivers import keys
from drivers.errors import BadURL, LinkLost, LinkTimeout, ProtocolError
from drivers.serial_link import LinkController, _no_extra, _options
from drivers.wire import messages
from drivers.wire.commands import Command, command
from drivers.wire.error_map import exception_for

_FAILED = {getattr(zmq, n) for n in ("EVENT_HANDSHAKE_FAILED_NO_DETAIL", "EVENT_HANDSHAKE_FAILED_PROTOCOL",
                                     "EVENT_HANDSHAKE_FAILED_AUTH") if hasattr(zmq, n)}


class NetworkController(LinkController):
    """A controller at the far end of a ZeroMQ request/reply link, optionally CURVE-encrypted."""

    schemes = ("zmq+tcp",)

    def __init__(self, endpoint: str, *, server_key: str | None = None, client_key: str | None = None,
                 timeout_s: float = 2.0, retries: int = 2) -> None:
        self.endpoint, self.timeout_s, self.retries = endpoint, timeout_s, retries
        host = urlsplit(endpoint).hostname or ""
        if (server_key is None) != (client_key is None):
            raise BadURL("give both server=PUBLIC_KEY_FILE and client=SECRET_KEY_FILE, or neither")
        from drivers.registry import is_loopback

        if server_key is None and not is_loopback(host):
            raise BadURL(f"refusing to talk to {host} unencrypted; give server= and client= key files "
                         f"({keys.HOW_TO_MAKE_KEYS})")
        self._curve = None
        if server_key is not None:
            server_public = keys.load_public_key(server_key)
            public, secret = keys.load_secret_key(client_key)  # type: ignore[arg-type]
            self._curve = (server_public, public, secret)
        self._ctx = zmq.Context()
        self._sock: zmq.Socket | None = None
        self._monitor: zmq.Socket | None = None
        self._session = secrets.token_hex(8)
        self._next_id = 0
        self._abort_ids = itertools.count(1)
        self._io = threading.Lock()  # one request on the main socket at a time, whichever thread asks
        try:
            self._identify()
        except Exception:
            self.close()
            raise

    @classmethod
    def from_url(cls, url: str, **options: object) -> "NetworkController":
        parts = urlsplit(url)
        _no_extra(options, "network")
        opts = _options(parts.query, {"server": str, "client": str, "timeout": float, "retries": int})
        try:
            host, port = parts.hostname, parts.port
        except ValueError:
            host, port = None, None
        if not host or not port:
            raise BadURL(f"network controller URL needs host and port: zmq+tcp://127.0.0.1:5555, not {url!r}")
        netloc = f"[{host}]" if ":" in host else host
        return cls(f"tcp://{netloc}:{port}", server_key=opts.get("server"),  # type: ignore[arg-type]
                   client_key=opts.get("client"), timeout_s=float(opts.get("timeout", 2.0)),  # type: ignore[arg-type]
                   retries=int(opts.get("retries", 2)))

    # ---- sockets -------------------------------------------------------------------------------------
    def _req_socket(self) -> zmq.Socket:
        sock = self._ctx.socket(zmq.REQ)
        sock.setsockopt(zmq.LINGER, 0)
        if self.endpoint.startswith("tcp://["):
            sock.setsockopt(zmq.IPV6, 1)
        if self._curve is not None:
            sock.curve_serverkey, sock.curve_publickey, sock.curve_secretkey = self._curve
        return sock

    def _connect(self) -> zmq.Socket:
        sock = self._req_socket()
        self._monitor = sock.get_monitor_socket(zmq.EVENT_DISCONNECTED | _mask(_FAILED))
        sock.connect(self.endpoint)
        self._sock = sock
        return sock

    def _drop(self) -> None:
        if self._sock is not None:
            try:
                self._sock.disable_monitor()
            except zmq.ZMQError:
                pass
            self._sock.close(0)
            self._sock = None
        if self._monitor is not None:
            self._monitor.close(0)
            self._monitor = None

    def close(self) -> None:
        self._drop()
        self._ctx.term()

    def _transact(self, cmd: Command, args: tuple, timeout_s: float) -> tuple:
        with self._io:
            return self._exchange(cmd, args, timeout_s)

    def _exchange(self, cmd: Command, args: tuple, timeout_s: float) -> tuple:
        self._next_id += 1
        frames = messages.encode_request(messages.Request(self._session, self._next_id, cmd, args))
        attempts = 1 + (self.retries if cmd.safe_to_repeat else 0)
        last: Exception | None = None
        for _ in range(attempts):
            sock = self._sock or self._connect()
            try:
                sock.send_multipart(frames, flags=zmq.NOBLOCK)
            except zmq.Again:
                pass  # not connected yet: REQ queues nothing, the poll below times out like a lost request
            try:
                reply, lost = self._wait(sock, timeout_s)
            except BaseException:
                self._drop()  # interrupted (Ctrl-C): this REQ socket would still expect the reply
                raise
            if lost is not None:
                self._drop()
                raise LinkLost(f"{lost} ({self.endpoint}) during {cmd.spelling}")
            if reply is None:
                self._drop()  # a REQ socket that missed its reply is unusable
                last = LinkTimeout(f"no reply to {cmd.spelling} from {self.endpoint} within {timeout_s:.2f} s")
                continue
            try:
                rep = messages.decode_reply(cmd, reply)
            except ProtocolError as exc:
                last = exc
                continue
            if rep.id != self._next_id:
                last = ProtocolError(f"reply id {rep.id} does not match request id {self._next_id}")
                continue
            if not rep.ok:
                raise exception_for(rep.code, rep.message)
            return rep.fields
        assert last is not None
        raise last

    def abort(self) -> None:
        """Stop the command in flight (from any thread) and make the stage safe, over a socket of its own."""
        self._aborts += 1
        cmd = command("ABORt")
        rid = next(self._abort_ids)
        frames = messages.encode_request(messages.Request(f"{self._session}-abort", rid, cmd, ()))
        wait_s = self._abort_wait_s()
        sock = self._req_socket()
        try:
            sock.connect(self.endpoint)
            sock.send_multipart(frames)
            if not sock.poll(int(wait_s * 1000)):
                raise LinkTimeout(f"abort not confirmed by {self.endpoint} within {wait_s:.2f} s")
            rep = messages.decode_reply(cmd, sock.recv_multipart())
        finally:
            sock.close(0)
        if rep.id != rid:
            raise ProtocolError(f"abort reply id {rep.id} does not match request id {rid}")
        if not rep.ok:
            raise exception_for(rep.code, rep.message)
        self._field_is_zero()

    def _wait(self, sock: zmq.Socket, timeout_s: float) -> tuple[list[bytes] | None, str | None]:
        poller = zmq.Poller()
        poller.register(sock, zmq.POLLIN)
        if self._monitor is not None:
            poller.register(self._monitor, zmq.POLLIN)
        deadline = time.monotonic() + timeout_s
        while (left := deadline - time.monotonic()) > 0:
            ready = dict(poller.poll(max(1, int(left * 1000))))
            if sock in ready:
                return sock.recv_multipart(), None
            if self._monitor is not None and self._monitor in ready:
                from zmq.utils.monitor import recv_monitor_message  # here: it loads asyncio, and events are rare

                event = recv_monitor_message(self._monitor)["event"]
                if event == zmq.EVENT_DISCONNECTED:
                    return None, "the controller server closed the connection"
                if event in _FAILED:
                    return None, ("the controller server refused the handshake (it may need CURVE keys: "
                                  "server= and client=; or the server key is wrong; or this client's public "
                                  "key is not in its allow directory)")
        return None, None


def _mask(events: set[int]) -> int:
    m = 0
    for e in events:
        m |= e
    return m
