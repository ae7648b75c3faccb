"""The server's dispatcher: runs decoded commands on one controller, with the checks a server owes the instrument.

It checks every argument against the controller's hard limits itself, answers bad input through the error queue
(stream) or an error reply (network), executes a retried network request once (request ids, remembered per
session), makes the stage safe after any controller fault, and runs a watchdog that withdraws the tip, switches
the drive off and sets the bias (and a magnet's field) to zero when a client falls silent while the tip is near the
surface or a magnet is left on. Over ZeroMQ, where several clients may share the server, the silence that counts
is that of the client that last sent a command acting on the instrument (the one driving the stage): a second client
that only polls the status does not keep a dead driver's stage engaged. The transports run the commands in a worker
thread (:mod:`.inflight`), so an abort request is handled ahead of a long command in flight, and the watchdog acts
through the controller's ``abort()`` and also aborts a command that overruns its expected time.
"""

from __future__ import annotations

import logging
import time
from collections import OrderedDict
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field

import numpy as np

from drivers.base import Capability, Controller
from drivers.errors import Aborted, CapabilityMissing, LimitExceeded
from drivers.server import inflight
from drivers.wire import messages
from drivers.wire.checks import check_limits, check_types
from drivers.wire.commands import Command, resolve
from drivers.wire.error_map import error_for
from drivers.wire.scpi import ErrorQueue, WireError, decode_params, encode_answer, split_line

log = logging.getLogger(__name__)

__all__ = ["Dispatcher", "Session"]

_SESSIONS = 64  # sessions remembered for deduplication
_REPLIES_PER_SESSION = 4


@dataclass
class Session:
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
        self.sessions: OrderedDict[str, Session] = OrderedDict()
        self.driving: str | None = None  # session of the last command that acts on the instrument (network)
        self._heard: dict[str, float] = {}  # when each network client last spoke (plain assignments: two threads)
        self.watch = inflight.CommandWatch(controller, watchdog_s, clock)  # the command in flight

    # ---- one command ---------------------------------------------------------------------------------
    def execute(self, cmd: Command, args: tuple, session: Session) -> tuple:
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
        if h == "ABORt" and self.watch.take_ahead():  # carried out by the serving loop already: the stage is safe
            return ()
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
    def handle_line(self, line: bytes, session: Session) -> bytes | None:
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
            if not cmd.query and cmd.method is not None:  # it acts on the instrument (*CLS only on the server)
                self.driving = req.session
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

    def _session(self, key: str) -> Session:
        s = self.sessions.pop(key, None) or Session()
        self.sessions[key] = s
        while len(self.sessions) > _SESSIONS:
            self.sessions.popitem(last=False)
        return s

    # ---- watchdog -----------------------------------------------------------------------------------
    def activity(self, session: str | None = None) -> None:
        """A client spoke (``session``: its token, when the transport knows it)."""
        self.last_activity = self.clock()
        if session is not None:
            if len(self._heard) >= 4 * _SESSIONS and session not in self._heard:
                self._heard = {k: v for k, v in self._heard.items() if k == self.driving}
            self._heard[session] = self.last_activity
        self._watchdog_armed = True

    def _last_heard(self) -> float:
        """When the client driving the stage last spoke; any client's message where none is known."""
        heard = self._heard.get(self.driving) if self.driving is not None else None
        return self.last_activity if heard is None else heard

    def watchdog(self) -> bool:
        """Make the stage safe if the client is silent too long with the tip near the surface or a field on."""
        if self.watchdog_s is None or not self._watchdog_armed:
            return False
        silent = self.clock() - self._last_heard()
        if silent <= self.watchdog_s:
            return False
        self._watchdog_armed = False  # once per silence
        try:
            s = self.controller.status()
            # Near the surface: engaged, or the feedback or the Z piezo could bring the tip down. A withdrawn
            # stage with the drive on (a client thinking between sweeps) is left alone; a magnet left on is not.
            at_risk = s.engaged or s.feedback_on or s.z_m > 0.0 or _field_on(self.controller)
        except Exception:
            at_risk = True
        if not at_risk:
            return False
        self.watch.abort(f"watchdog: client silent for {silent:.2f} s (limit {self.watchdog_s:.2f} s) with the "
                         f"tip engaged or a field on; withdrawing, drive off, bias zero, field zero")
        self.watchdog_trips += 1
        return True


_ANY = Command("", False, (), (), False)


def _field_on(controller: Controller) -> bool:
    """Whether a magnet holds a field above 1 % of its range (its sensor's noise stays well below that)."""
    if not controller.has(Capability.APPLIED_FIELD):
        return False
    try:
        field = controller.read_field()
    except CapabilityMissing:  # declared but not offered after all: there is no field to leave on
        return False
    return abs(field) > 0.01 * controller.limits.field_max_a_per_m
