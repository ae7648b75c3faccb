"""Serve any Controller over a serial-style byte stream (:mod:`.stream`) or over ZeroMQ (:mod:`.zmq_transport`);
the commands run through one :class:`~.dispatch.Dispatcher`.

The server is the instrument's last line of defence: it checks every argument against the controller's hard
limits itself, answers bad input and keeps serving, executes a retried network request once, makes the stage
safe after any controller fault and when it stops, and runs a watchdog for silent clients. Secrets never
appear in logs, replies or errors. Link faults of a fault plan are applied here (:mod:`drivers.link_faults`).
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable

from drivers.base import Controller
from drivers.errors import InsecureBind
from drivers.fault_plan import LINK_KINDS, FaultPlan
from drivers.link_faults import LinkFaults
from drivers.server.dispatch import Dispatcher, Session
from drivers.server.stream import serve_stream
from drivers.server.zmq_transport import serve_zmq

log = logging.getLogger(__name__)

__all__ = ["serve", "Dispatcher", "Session", "InsecureBind"]


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
                        "(the simulated stage's fault proxy)", ", ".join(others))
    dispatcher = Dispatcher(controller, watchdog_s=watchdog_s, clock=clock)
    link_faults = LinkFaults(faults, clock)
    try:
        if transport == "serial":
            if server_key or allow_dir:
                raise InsecureBind("the serial transport has no encryption; CURVE keys apply to --transport zmq")
            serve_stream(dispatcher, link_faults, bind, announce, stop, poll_s)
        elif transport == "zmq":
            serve_zmq(dispatcher, link_faults, bind, server_key, allow_dir, announce, stop, poll_s)
        else:
            raise ValueError(f"transport {transport!r} is not 'serial' or 'zmq'")
    finally:
        dispatcher.safe_stage()
