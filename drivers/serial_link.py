"""Client driver for a controller behind a byte stream: serial ports, pseudo-terminals, pyserial ``socket://``.

URL forms: ``serial:///dev/ttyUSB0?baud=115200&timeout=2&retries=1`` and
``socket://127.0.0.1:5025?timeout=2``. Each request is one line ``*CLS;<command>;SYSTem:ERRor?`` so that
every command, query or not, gets exactly one reply, ending with its error status. Every read has a deadline
and checks for a complete reply (``read_until`` alone returns silently on a timeout); after a timeout or a
garbled reply the link is resynchronised with an echo token before it is used again. Only commands marked
safe to repeat are retried.

``abort()`` may come from another thread while a command is in flight: a line of its own that the server
handles ahead of the running command (:mod:`drivers.serial_abort`).

:class:`LinkController` here holds the part shared with the network driver: every Controller method as one
command of ``drivers.wire.commands``.
"""

from __future__ import annotations

import abc
import itertools
import select
import threading
import time
from collections.abc import Iterator, Sequence
from urllib.parse import parse_qs, urlsplit, urlunsplit

import numpy as np

from drivers.base import Capability, Controller, LineData, LineSpec, Limits, Status, SweepData
from drivers.errors import Aborted, BadURL, LinkLost, LinkTimeout, ProtocolError
from drivers.serial_abort import StreamAbort
from drivers.wire.commands import MAX_SWEEP_POINTS, Command, command, line_args, ramp_s
from drivers.wire.error_map import exception_for
from drivers.wire.scpi import (
    WireError, decode_answer, encode_params, format_command, format_line, parse_reply, reply_end,
)


class LinkController(Controller):
    """A Controller whose every method is one command over some link; subclasses move the bytes."""

    timeout_s: float = 2.0
    #: Deflection samples asked for per request; links with little bandwidth lower it.
    chunk_limit: int = 1 << 18
    #: Counts abort() calls: a record or a split sweep in progress stops at its next request after one.
    _aborts: int = 0

    @abc.abstractmethod
    def _transact(self, cmd: Command, args: tuple, timeout_s: float) -> tuple:
        """Send one command, return its typed reply fields or raise the error the server reported."""

    def _transfer_s(self, cmd: Command, args: tuple) -> float:
        """Extra time the link itself needs for this command's data (none for fast links)."""
        return 0.0

    #: The magnet's field as this client last set or read it [A/m]; a field change, and making the stage safe,
    #: wait for the ramp from it. None after a lost reply to a field change (the magnet may be anywhere on its
    #: way). A field another client left on is not known: a ramp longer than allowed for ends in a timeout and,
    #: these commands being safe to repeat, a retry that finds the magnet there.
    _field_a_per_m: float | None = 0.0

    def _call(self, spelling: str, *args: object, extra_s: float = 0.0) -> object:
        cmd = command(spelling)
        limits = getattr(self, "limits", Limits())
        extra = (cmd.expected_s(args, limits) if cmd.expected_s is not None else 0.0) + extra_s
        fields = self._transact(cmd, args, self.timeout_s + extra + self._transfer_s(cmd, args))
        return cmd.unpack(args, fields) if cmd.unpack is not None else None

    def _identify(self) -> None:
        self.info = self._call("*IDN?")  # type: ignore[assignment]
        self.capabilities = self._call("SYSTem:CAPabilities?")  # type: ignore[assignment]
        self.limits = self._call("SYSTem:LIMits?")  # type: ignore[assignment]

    # ---- the Controller interface -----------------------------------------------------------------------
    def read(self, channels: Sequence[str]) -> dict[str, float]:
        return self._call("MEASure:READ?", tuple(channels))  # type: ignore[return-value]

    def record_deflection(self, samples: int, rate_hz: float, *, chunk: int = 1 << 18) -> Iterator[np.ndarray]:
        chunk = max(1, min(int(chunk), self.chunk_limit))
        aborts = self._aborts
        self._call("ACQuire:DEFLection:STARt", int(samples), float(rate_hz), chunk)
        got = 0
        cmd = command("ACQuire:DEFLection:NEXT?")
        while got < samples:
            self._not_aborted_since(aborts, "deflection record")
            wait = self.timeout_s + chunk / rate_hz + self._transfer_s(cmd, (chunk,))
            part = cmd.unpack((), self._transact(cmd, (), wait))  # type: ignore[misc]
            if not len(part):
                return
            got += len(part)
            yield part

    def set_drive(self, frequency_hz: float, amplitude_v: float) -> None:
        self._call("DRIVe:SET", float(frequency_hz), float(amplitude_v))

    def drive_off(self) -> None:
        self._call("DRIVe:OFF")

    def set_lockin_time_constant(self, seconds: float) -> None:
        self._call("DRIVe:LOCKin:TCONstant", float(seconds))

    def sweep(self, frequencies_hz: np.ndarray, amplitude_v: float, *, settle_s: float | None = None) -> SweepData:
        f = np.asarray(frequencies_hz, float).ravel()
        aborts = self._aborts
        parts = [self._not_aborted_since(aborts, "sweep") or
                 self._call("DRIVe:SWEep?", float(amplitude_v), None if settle_s is None else float(settle_s),
                            tuple(float(x) for x in f[i:i + MAX_SWEEP_POINTS]))
                 for i in range(0, max(len(f), 1), MAX_SWEEP_POINTS)]
        return SweepData(*(np.concatenate([getattr(p, k) for p in parts])  # type: ignore[arg-type]
                           for k in ("frequency_hz", "amplitude_v", "phase_deg")))

    def move_z(self, z_m: float) -> None:
        self._call("MOTion:Z", float(z_m))

    def step_coarse(self, steps: int) -> None:
        self._call("MOTion:COARse", int(steps))

    def move_xy(self, x_m: float, y_m: float) -> None:
        self._call("MOTion:XY", float(x_m), float(y_m))

    def withdraw(self) -> None:
        self._call("MOTion:WITHdraw")

    def set_feedback(self, enabled: bool, *, setpoint_v: float | None = None,
                     p_gain: float | None = None, i_gain: float | None = None) -> None:
        opt = lambda v: None if v is None else float(v)  # noqa: E731
        self._call("FEEDback:SET", bool(enabled), opt(setpoint_v), opt(p_gain), opt(i_gain))

    def scan_line(self, spec: LineSpec) -> LineData:
        return self._call("SCAN:LINE?", *line_args(spec))  # type: ignore[return-value]

    def force_curve(self, z_stop_m: float, points: int):
        return self._call("FORCe:CURVe?", float(z_stop_m), int(points))

    def set_bias(self, bias_v: float) -> None:
        self._call("BIAS:VOLTage", float(bias_v))

    def status(self) -> Status:
        return self._call("STATus?")  # type: ignore[return-value]

    def set_field(self, field_a_per_m: float) -> None:
        if field_a_per_m == 0.0 and not self.has(Capability.APPLIED_FIELD):
            return  # zero is always allowed, even without a magnet (the base class's promise)
        if self._field_a_per_m is None:
            self.read_field()
        wait = ramp_s(self.limits, float(self._field_a_per_m), float(field_a_per_m))
        self._field_a_per_m = None  # unknown until the reply: a lost one leaves the magnet anywhere on its way
        self._call("MAGNet:FIELd", float(field_a_per_m), extra_s=wait)
        self._field_a_per_m = float(field_a_per_m)

    def read_field(self) -> float:
        value = self._call("MAGNet:FIELd?")
        self._field_a_per_m = float(value)  # type: ignore[arg-type]
        return value  # type: ignore[return-value]

    def probe_hint(self) -> dict[str, float] | None:
        return self._call("SYSTem:PROBe?")  # type: ignore[return-value]

    def make_safe(self) -> None:
        """Withdraw, drive off, bias zero (and field zero with a magnet) in one command; the server attempts each
        step even if one fails. The reply may take the magnet's ramp back from the last field set here."""
        self._call("SYSTem:SAFE", extra_s=self._field_home_s())
        self._field_is_zero()

    def zero_applied_field(self) -> None:
        self._call("FIELd:ZERO", extra_s=self._field_home_s())
        self._field_is_zero()

    def _field_home_s(self) -> float:
        """The magnet's ramp to 0 from the field last set here (after a lost reply: the whole range) [s]."""
        if not self.has(Capability.APPLIED_FIELD):
            return 0.0
        lim, last = getattr(self, "limits", Limits()), self._field_a_per_m
        return ramp_s(lim, lim.field_max_a_per_m if last is None else last, 0.0)

    def _field_is_zero(self) -> None:  # after a confirmed make-safe or abort
        if self.has(Capability.APPLIED_FIELD):
            self._field_a_per_m = 0.0

    def server_watchdog_s(self) -> float | None:
        """The server's silence limit [s]: it makes the stage safe when the client says nothing that long while
        the tip is near the surface; None if its watchdog is off."""
        return self._call("SYSTem:WATChdog?")  # type: ignore[return-value]

    def _not_aborted_since(self, aborts: int, what: str) -> None:
        if self._aborts != aborts:
            raise Aborted(f"{what} stopped by abort")

    def _abort_wait_s(self) -> float:
        """How long an abort may take: the link's timeout, a full retraction and the magnet's ramp to 0."""
        limits = getattr(self, "limits", Limits())
        return self.timeout_s + limits.z_range_m / limits.z_speed_max_m_per_s + self._field_home_s()


def _no_extra(options: dict[str, object], scheme: str) -> None:
    unknown = sorted(k for k, v in options.items() if v is not None)
    if unknown:
        raise BadURL(f"option {unknown[0]!r} does not apply to {scheme} controllers (URL options: timeout, "
                     f"retries{', baud' if scheme == 'serial' else ', server, client'})")


def _options(query: str, allowed: dict[str, type]) -> dict[str, object]:
    out: dict[str, object] = {}
    for key, values in parse_qs(query, keep_blank_values=True).items():
        if key not in allowed:
            raise BadURL(f"unknown controller URL option {key!r} (allowed: {', '.join(allowed)})")
        try:
            out[key] = allowed[key](values[-1])
        except ValueError:
            raise BadURL(f"controller URL option {key}={values[-1]!r} is not a {allowed[key].__name__}") from None
    if "timeout" in out and not 0 < out["timeout"] <= 3600:  # type: ignore[operator]
        raise BadURL(f"timeout={out['timeout']} s is outside (0, 3600] s")
    if "retries" in out and not 0 <= out["retries"] <= 10:  # type: ignore[operator]
        raise BadURL(f"retries={out['retries']} is outside [0, 10]")
    return out


class SerialController(StreamAbort, LinkController):
    """A controller at the far end of a serial line (or anything pyserial opens), speaking our SCPI tree."""

    schemes = ("serial", "socket")

    def __init__(self, port: str, *, baud: int = 115200, timeout_s: float = 2.0, retries: int = 1) -> None:
        import serial

        self.timeout_s, self.retries, self.baud = timeout_s, retries, baud
        self.chunk_limit = 4096  # 16 kB per request: about 1.4 s at 115200 baud
        self._tokens = itertools.count(1)
        self._pending = bytearray()
        self._io = threading.Lock()  # held by the thread that exchanges a request and reads its reply
        self._write_lock = threading.Lock()  # whole lines only, whichever thread writes
        self._acks: dict[str, list] = {}  # abort echo token -> [threading.Event, (code, message) or None]
        self._inflight_transfer_s = 0.0
        try:
            # Reads never block inside pyserial (timeout 0, set once: changing it reconfigures a real port);
            # _read_some waits on the descriptor itself, so bulk replies come in as large reads.
            self._port = serial.serial_for_url(port, baudrate=baud, timeout=0, write_timeout=timeout_s)
        except (serial.SerialException, OSError, ValueError) as exc:
            raise LinkLost(f"cannot open serial port {port}: {exc}") from None
        self.port_name = port
        try:
            self._resync(required=True)
            self._identify()
        except Exception:
            self._port.close()
            raise

    @classmethod
    def from_url(cls, url: str, **options: object) -> "SerialController":
        parts = urlsplit(url)
        _no_extra(options, "serial")
        opts = _options(parts.query, {"baud": int, "timeout": float, "retries": int})
        if parts.scheme == "serial":
            if not parts.path:
                raise BadURL(f"serial URL {url!r} names no device (serial:///dev/ttyUSB0)")
            port = parts.path
        else:
            port = urlunsplit((parts.scheme, parts.netloc, parts.path, "", ""))
        return cls(port, baud=int(opts.get("baud", 115200)), timeout_s=float(opts.get("timeout", 2.0)),
                   retries=int(opts.get("retries", 1)))

    def close(self) -> None:
        self._port.close()

    # ---- bytes ---------------------------------------------------------------------------------------
    def _transfer_s(self, cmd: Command, args: tuple) -> float:
        # Worst-case bytes each way at 10 bit times per byte (start, 8 data, stop).
        n = 4 * self.chunk_limit if cmd.header == "ACQuire:DEFLection:NEXT" else 0
        if cmd.header == "SCAN:LINE":
            n = 8 * args[3] * (2 + len(args[5]))
        elif cmd.header == "DRIVe:SWEep":
            n = 49 * len(args[2])  # 24 bytes back, up to 25 characters out, per point
        elif cmd.header == "FORCe:CURVe":
            n = 32 * args[1]
        return 10.0 * n / self.baud

    def _write(self, data: bytes) -> None:
        import serial

        try:
            with self._write_lock:
                self._port.write(data)
                self._port.flush()
        except (serial.SerialException, OSError) as exc:
            raise LinkLost(f"write to {self.port_name} failed: {exc}") from None

    def _read_some(self, timeout_s: float) -> bytes:
        import serial

        try:
            try:
                fd = self._port.fileno()
            except (AttributeError, NotImplementedError, OSError, serial.SerialException):
                fd = None
            if fd is not None:
                ready, _, _ = select.select([fd], [], [], max(0.0, min(timeout_s, 0.05)))
                return self._port.read(1 << 16) if ready else b""
            data = self._port.read(1 << 16)  # a URL handler without a descriptor: poll
            if not data:
                time.sleep(min(timeout_s, 0.002))
            return data
        except (serial.SerialException, OSError) as exc:
            raise LinkLost(f"read from {self.port_name} failed: {exc}") from None

    def _read_reply(self, timeout_s: float, what: str, *, until=None) -> bytes | None:
        """The next reply message; abort echoes are taken out on the way. With ``until`` (a callable), returns
        None as soon as it is true after an echo."""
        deadline = time.monotonic() + timeout_s
        buf = self._pending
        while True:
            end = reply_end(bytes(buf))
            if end is not None:
                message = bytes(buf[:end])
                self._pending = buf = bytearray(buf[end:])
                if self._take_ack(message):
                    if until is not None and until():
                        return None
                    continue
                return message
            left = deadline - time.monotonic()
            if left <= 0:
                self._pending = bytearray()
                raise LinkTimeout(f"no complete reply to {what} from {self.port_name} within {timeout_s:.2f} s")
            buf += self._read_some(left)

    def _resync(self, *, required: bool = False) -> None:
        """Throw away whatever is in flight and make sure the next reply belongs to the next request."""
        token = f"sync{next(self._tokens)}"
        self._pending = bytearray()
        try:
            self._port.reset_input_buffer()
        except Exception:
            pass
        self._write(b"\n" + format_line([b"*CLS", format_command("SYSTem:ECHO?", (f'"{token}"',))]))
        marker = f'"{token}"\n'.encode()
        deadline = time.monotonic() + self.timeout_s
        seen = bytearray()
        while time.monotonic() < deadline:
            seen += self._read_some(deadline - time.monotonic())
            at = seen.find(marker)
            if at >= 0:
                self._echoes_in(bytes(seen[:at]))
                self._pending = bytearray(seen[at + len(marker):])
                self._dirty = False
                return
        self._dirty = True
        if required:
            raise LinkTimeout(f"no answer from {self.port_name} within {self.timeout_s:.2f} s "
                              f"(is a controller server at the other end?)")

    _dirty = False

    def _transact(self, cmd: Command, args: tuple, timeout_s: float) -> tuple:
        with self._io:
            self._inflight_transfer_s = self._transfer_s(cmd, args)
            try:
                return self._exchange(cmd, args, timeout_s)
            except BaseException as exc:
                if not isinstance(exc, Exception):  # Ctrl-C while the reply was on its way
                    self._dirty = True
                raise
            finally:
                if self._acks:
                    self._collect_acks(time.monotonic() + self._abort_wait_s())

    def _exchange(self, cmd: Command, args: tuple, timeout_s: float) -> tuple:
        kinds = tuple(p.kind for p in cmd.params)
        line = format_line([b"*CLS", format_command(cmd.spelling, encode_params(kinds, args)), b"SYST:ERR?"])
        attempts = 1 + (self.retries if cmd.safe_to_repeat else 0)
        last: Exception | None = None
        for _ in range(attempts):
            if self._dirty:
                self._resync()
                if self._dirty:
                    last = LinkTimeout(f"{self.port_name} does not answer (resynchronisation failed)")
                    continue
            self._write(line)
            try:
                answers = parse_reply(self._read_reply(timeout_s, cmd.spelling))
                if not answers:
                    raise WireError(-102, "empty reply")
                code, message = decode_answer(("int", "str"), answers[-1])
            except (LinkTimeout, ProtocolError) as exc:
                last = exc
                self._dirty = True
                continue
            if code != 0:
                raise exception_for(code, message)  # type: ignore[arg-type]
            if len(answers) != (2 if cmd.query else 1):
                raise ProtocolError(f"{cmd.spelling}: expected {2 if cmd.query else 1} answers, "
                                    f"got {len(answers)}")
            try:
                return decode_answer(cmd.reply, answers[0]) if cmd.query else ()
            except WireError as exc:
                last = exc
                self._dirty = True
        assert last is not None
        raise last
