"""Abort on a byte stream, from any thread, while another thread may be waiting for a reply.

``abort()`` writes the line ``ABORt;SYSTem:ERRor?;SYSTem:ECHO? "abortN"``; the server handles it ahead of the
command in flight and answers it after that command's reply, once the stage is safe. Whichever thread reads
replies at that moment takes the echo out of the stream: the thread of the command in flight (its transaction
collects outstanding echoes before it lets go of the link), or ``abort()`` itself when the link is idle. An
echo that a resynchronisation threw away counts as seen; its status is then read back with ``status()``.
"""

from __future__ import annotations

import threading
import time

from drivers.errors import ControllerFault, LinkTimeout, ProtocolError
from drivers.wire.error_map import exception_for
from drivers.wire.scpi import WireError, decode_answer, format_command, format_line, parse_reply


class StreamAbort:
    """Mixed into the serial client: needs ``_io`` (a lock held per transaction), ``_write``, ``_read_reply``,
    ``_tokens``, ``_acks`` (token -> [Event, (code, message) or None]), ``_inflight_transfer_s``,
    ``_abort_wait_s`` and ``_field_is_zero``."""

    def abort(self) -> None:
        """Stop the command in flight (from any thread) and make the stage safe; returns once confirmed."""
        self._aborts += 1
        name = f"abort{next(self._tokens)}"
        done = threading.Event()
        self._acks[name] = entry = [done, None]
        deadline = time.monotonic() + self._abort_wait_s()
        try:
            self._write(format_line([b"ABORt", b"SYSTem:ERRor?", format_command("SYSTem:ECHO?", (f'"{name}"',))]))
            while not done.is_set():
                left = deadline - time.monotonic()
                if left <= 0:
                    raise LinkTimeout(f"abort not confirmed by {self.port_name} within {self._abort_wait_s():.2f} s")
                # a command in flight takes the echo out with its own reply; else this thread reads it
                if self._io.acquire(timeout=min(0.005, left)):
                    try:
                        self._collect_acks(deadline + self._inflight_transfer_s)
                    finally:
                        self._io.release()
        finally:
            self._acks.pop(name, None)
        if entry[1] is None:  # the echo was seen during a resynchronisation, its status was not
            if not self.status().safe:
                raise ControllerFault(-300, "abort sent, but the stage does not report safe")
            self._field_is_zero()
            return
        code, message = entry[1]
        if code != 0:
            raise exception_for(code, message)
        self._field_is_zero()

    def _take_ack(self, message: bytes) -> bool:
        """If ``message`` is the echo of an abort line, record its error status and say so."""
        if b'"abort' not in message:
            return False
        try:
            answers = parse_reply(message)
            token = decode_answer(("str",), answers[-1])[0]
        except (WireError, IndexError):
            return False
        entry = self._acks.get(token) if isinstance(token, str) else None
        if entry is None or len(answers) != 2:
            return False
        try:
            entry[1] = decode_answer(("int", "str"), answers[0])
        except WireError:
            entry[1] = (-102, "garbled abort status")
        entry[0].set()
        return True

    def _echoes_in(self, skipped: bytes) -> None:
        """Abort echoes among bytes a resynchronisation threw away: seen, status unknown."""
        for token, entry in list(self._acks.items()):
            if f'"{token}"'.encode() in skipped:
                entry[0].set()

    def _collect_acks(self, deadline: float) -> None:
        """Read until every abort echo outstanding is in (other replies are stale: dropped). Holds the I/O."""
        outstanding = lambda: [e for e in self._acks.values() if not e[0].is_set()]  # noqa: E731
        while outstanding():
            left = deadline - time.monotonic()
            if left <= 0:
                return
            try:
                self._read_reply(left, "ABORt", until=lambda: not outstanding())
            except (LinkTimeout, ProtocolError):
                return

