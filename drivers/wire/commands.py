"""Our command set: every Controller method as a command of an SCPI-style tree, with typed arguments and
replies, hard-limit checks, and whether a command is safe to repeat after a lost reply.

Both codecs (``scpi`` for byte streams, ``messages`` for the network) carry these commands; the client
drivers build them and the server runs them. Argument tuples hold one value per :class:`Param`; a trailing
"rest" parameter (kind ending in ``*``) holds a tuple of the remaining values.

Kinds: ``float``, ``int``, ``bool``, ``opt_float`` (None = keep the present value; ``DEF`` on the line),
``name`` (a channel or capability name), ``str`` (quoted), ``text`` (an unquoted ``*IDN?`` field),
``floats*``, ``names*``, ``strs*``, and in replies ``f64[]`` / ``f32[]`` arrays.
"""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from drivers.base import (
    Capability, Controller, ControllerInfo, ForceCurve, LineData, LineSpec, Limits, PassData, SecondPass,
    Status, SweepData,
)
from drivers.errors import LimitExceeded
from drivers.wire.checks import within
from drivers.wire.scpi import NAME, WireError

Bounds = Callable[[Limits], tuple[float | None, float | None]]

#: Sanity bounds the instrument's Limits do not cover (protocol bounds, common practice, no source).
MAX_PIXELS = 65536
MAX_PASSES = 64
MAX_LINE_RATE_HZ = 1000.0
MAX_TIME_CONSTANT_S = 100.0
MAX_SETTLE_S = 60.0
MAX_COARSE_STEPS = 100_000
MAX_SAMPLES = 1 << 34
MAX_CHUNK = 1 << 20
MAX_SWEEP_POINTS = 2048  # per request; the client drivers split longer sweeps


@dataclass(frozen=True)
class Param:
    name: str
    kind: str
    bounds: Bounds | None = None  # inclusive (low, high); None on a side = unbounded
    unit: str = ""


@dataclass(frozen=True)
class Command:
    """One command of the tree. ``method`` None means the server answers it itself (error queue, echo)."""

    header: str  # canonical spelling: upper-case letters form the short mnemonic
    query: bool
    params: tuple[Param, ...]
    reply: tuple[str, ...]
    safe_to_repeat: bool  # a repeat after a lost reply leaves the instrument as one run would
    method: str | None = None
    capability: Capability | None = None
    invoke: Callable[[Controller, tuple], tuple] | None = None  # server side: run, return reply fields
    unpack: Callable[[tuple, tuple], Any] | None = None  # client side: (args, fields) -> return value
    check: Callable[[Limits, tuple], None] | None = None  # extra limit checks beyond Param.bounds
    expected_s: Callable[[tuple, Limits], float] | None = None  # how long the instrument may need

    @property
    def spelling(self) -> str:
        """The full spelling as sent on the line, ``?`` included for queries."""
        return self.header + ("?" if self.query else "")


def _range(lo: Callable[[Limits], float | None], hi: Callable[[Limits], float | None]) -> Bounds:
    return lambda lim: (lo(lim), hi(lim))


_Z = _range(lambda l: 0.0, lambda l: l.z_range_m)
_BIAS = _range(lambda l: -l.bias_max_v, lambda l: l.bias_max_v)
_XY = _range(lambda l: -l.scan_size_max_m, lambda l: l.scan_size_max_m)
_FREQ = _range(lambda l: 0.0, lambda l: l.frequency_max_hz)
_FIELD = _range(lambda l: -l.field_max_a_per_m, lambda l: l.field_max_a_per_m)


def ramp_s(lim: Limits, from_a_per_m: float, to_a_per_m: float) -> float:
    """How long the magnet needs to go from one field to another and settle [s] (0 for no change, and for a
    target beyond the magnet's limit or not finite, which is refused before anything is set)."""
    if from_a_per_m == to_a_per_m or not abs(to_a_per_m) <= lim.field_max_a_per_m:  # also catches NaN
        return 0.0
    return abs(to_a_per_m - from_a_per_m) / max(lim.field_ramp_a_per_m_per_s, 1e-9) + lim.field_settle_s


def _fixed(lo: float | None, hi: float | None) -> Bounds:
    return lambda lim: (lo, hi)


def _none(c: Controller, a: tuple) -> tuple:
    return ()


def _check_passes(lim: Limits, args: tuple) -> None:
    flat = args[-1]
    if len(flat) % 2:
        raise WireError(-109, "second passes come as lift height, bias pairs; one value is missing")
    if len(flat) // 2 > MAX_PASSES:
        raise LimitExceeded("second passes", len(flat) // 2, 0, MAX_PASSES, "")
    for lift, bias in zip(flat[0::2], flat[1::2]):
        within("lift_height_m", lift, 0.0, lim.z_range_m, "m")
        within("bias_v", bias, -lim.bias_max_v, lim.bias_max_v, "V")


def _check_sweep(lim: Limits, args: tuple) -> None:
    freqs = args[-1]
    if not 1 <= len(freqs) <= MAX_SWEEP_POINTS:
        raise LimitExceeded("sweep points", len(freqs), 1, MAX_SWEEP_POINTS, "")
    for f in freqs:
        within("frequency_hz", f, 0.0, lim.frequency_max_hz, "Hz")


def _line_spec(args: tuple) -> LineSpec:
    y, x0, length, pixels, rate, flat = args
    passes = tuple(SecondPass(float(h), float(b)) for h, b in zip(flat[0::2], flat[1::2]))
    return LineSpec(y_m=y, x_start_m=x0, length_m=length, pixels=pixels, line_rate_hz=rate, passes=passes)


def line_args(spec: LineSpec) -> tuple:
    flat = tuple(v for p in spec.passes for v in (float(p.lift_height_m), float(p.bias_v)))
    return (float(spec.y_m), float(spec.x_start_m), float(spec.length_m), int(spec.pixels),
            float(spec.line_rate_hz), flat)


def _scan_invoke(c: Controller, args: tuple) -> tuple:
    data = c.scan_line(_line_spec(args))
    n = len(data.passes)
    if n != len(args[-1]) // 2:
        raise WireError(-200, f"controller returned {n} second passes, {len(args[-1]) // 2} were asked for")
    cat = (lambda key: np.concatenate([np.asarray(getattr(p, key), float) for p in data.passes])
           if n else np.zeros(0))
    has_df = n > 0 and all(p.frequency_shift_hz is not None for p in data.passes)
    return (np.asarray(data.topography_m, float), np.asarray(data.amplitude_error_v, float),
            cat("phase_deg"), cat("amplitude_v"), cat("frequency_shift_hz") if has_df else np.zeros(0))


def _scan_unpack(args: tuple, fields: tuple) -> LineData:
    spec = _line_spec(args)
    topo, err, phase, amp, df = fields
    n, px = len(spec.passes), len(topo)
    if len(err) != px or len(phase) != n * px or len(amp) != n * px or len(df) not in (0, n * px):
        raise WireError(-104, f"scan line reply sizes do not match {n} passes of {px} pixels")
    passes = []
    for k, p in enumerate(spec.passes):
        sl = slice(k * px, (k + 1) * px)
        passes.append(PassData(p.lift_height_m, p.bias_v, phase[sl].copy(), amp[sl].copy(),
                               df[sl].copy() if len(df) else None))
    return LineData(topography_m=topo, amplitude_error_v=err, passes=passes)


def _status_invoke(c: Controller, args: tuple) -> tuple:
    s = c.status()
    return (bool(s.engaged), float(s.z_m), float(s.coarse_position_m), float(s.bias_v), bool(s.drive_on),
            float(s.drive_frequency_hz), float(s.drive_amplitude_v), bool(s.feedback_on),
            tuple(_printable(f) for f in s.faults))


def _printable(text: str) -> str:
    return "".join(ch if 32 <= ord(ch) < 127 else "?" for ch in str(text))[:200]


def _status_unpack(args: tuple, f: tuple) -> Status:
    return Status(engaged=f[0], z_m=f[1], coarse_position_m=f[2], bias_v=f[3], drive_on=f[4],
                  drive_frequency_hz=f[5], drive_amplitude_v=f[6], feedback_on=f[7], faults=tuple(f[8]))


_IDN_SAFE = re.compile(r"[,;\"\n\r]")


def _idn_invoke(c: Controller, args: tuple) -> tuple:
    i = c.info
    return tuple(_IDN_SAFE.sub("_", _printable(v)).strip() or "0" for v in (i.maker, i.model, i.serial, i.firmware))


_LIMIT_FIELDS = tuple(f.name for f in dataclasses.fields(Limits))  # both ends run the same table
def _hint_invoke(c: Controller, args: tuple) -> tuple:
    # "name=value" items: the interface lets a controller name any quantity it knows about the probe
    hint = c.probe_hint() or {}
    return (tuple(f"{k}={float(v)!r}" for k, v in sorted(hint.items())
                  if NAME.match(str(k)) and v is not None),)


def _hint_unpack(args: tuple, f: tuple) -> dict[str, float] | None:
    hint = {}
    for item in f[0]:
        key, sep, value = item.partition("=")
        try:
            hint[key] = float(value)
        except ValueError:
            raise WireError(-104, f"probe hint item {item[:40]!r} is not name=number") from None
    return hint or None


def _read_invoke(c: Controller, args: tuple) -> tuple:
    values = c.read(list(args[0]))
    return (tuple(float(values[n]) for n in args[0]),)


_P = Param
COMMANDS: tuple[Command, ...] = (
    # IEEE 488.2 common commands
    Command("*IDN", True, (), ("text",) * 4, True, "info", invoke=_idn_invoke,
            unpack=lambda a, f: ControllerInfo(*f)),
    Command("*RST", False, (), (), True, "make_safe", invoke=lambda c, a: (c.make_safe(), ())[1]),
    Command("*CLS", False, (), (), True),
    Command("*OPC", True, (), ("int",), True, unpack=lambda a, f: f[0]),
    # answered by the server itself
    Command("SYSTem:ERRor", True, (), ("int", "str"), False, unpack=lambda a, f: f),
    Command("SYSTem:ECHO", True, (_P("token", "str"),), ("str",), True, unpack=lambda a, f: f[0]),
    Command("SYSTem:WATChdog", True, (), ("float",), True, unpack=lambda a, f: f[0] if f[0] > 0 else None),
    # identity and limits
    Command("SYSTem:CAPabilities", True, (), ("names*",), True, "capabilities",
            invoke=lambda c, a: (tuple(sorted(x.value for x in c.capabilities)),),
            unpack=lambda a, f: frozenset(Capability(x) for x in f[0] if x in Capability._value2member_map_)),
    Command("SYSTem:LIMits", True, (), ("float",) * len(_LIMIT_FIELDS), True, "limits",
            invoke=lambda c, a: tuple(float(getattr(c.limits, k)) for k in _LIMIT_FIELDS),
            unpack=lambda a, f: Limits(**dict(zip(_LIMIT_FIELDS, f)))),
    Command("SYSTem:PROBe", True, (), ("strs*",), True, "probe_hint",
            invoke=_hint_invoke, unpack=_hint_unpack),
    Command("SYSTem:SAFE", False, (), (), True, "make_safe", invoke=lambda c, a: (c.make_safe(), ())[1]),
    # stop what runs and make safe: the servers handle it ahead of the command in flight (SCPI's ABORt)
    Command("ABORt", False, (), (), True, "abort", invoke=lambda c, a: (c.abort(), ())[1]),
    Command("FIELd:ZERO", False, (), (), True, "zero_applied_field",
            invoke=lambda c, a: (c.zero_applied_field(), ())[1]),
    # signals
    Command("MEASure:READ", True, (_P("channels", "names*"),), ("floats*",), True, "read",
            invoke=_read_invoke, unpack=lambda a, f: dict(zip(a[0], f[0]))),
    Command("ACQuire:DEFLection:STARt", False,
            (_P("samples", "int", _fixed(1, MAX_SAMPLES)),
             _P("rate_hz", "float", _range(lambda l: 0.0, lambda l: l.sample_rate_max_hz), "Hz"),
             _P("chunk", "int", _fixed(1, MAX_CHUNK))),
            (), False, "record_deflection", Capability.THERMAL_RECORD),
    Command("ACQuire:DEFLection:NEXT", True, (), ("f32[]",), False, "record_deflection",
            Capability.THERMAL_RECORD, unpack=lambda a, f: f[0].astype(np.float32),
            expected_s=lambda a, l: 0.0),
    # drive and lock-in
    Command("DRIVe:SET", False, (_P("frequency_hz", "float", _FREQ, "Hz"),
                                 _P("amplitude_v", "float", _range(lambda l: 0.0, lambda l: l.drive_max_v), "V")),
            (), True, "set_drive", invoke=lambda c, a: (c.set_drive(a[0], a[1]), ())[1]),
    Command("DRIVe:OFF", False, (), (), True, "drive_off", invoke=lambda c, a: (c.drive_off(), ())[1]),
    Command("DRIVe:LOCKin:TCONstant", False, (_P("seconds", "float", _fixed(1e-9, MAX_TIME_CONSTANT_S), "s"),),
            (), True, "set_lockin_time_constant",
            invoke=lambda c, a: (c.set_lockin_time_constant(a[0]), ())[1]),
    Command("DRIVe:SWEep", True,
            (_P("amplitude_v", "float", _range(lambda l: 0.0, lambda l: l.drive_max_v), "V"),
             _P("settle_s", "opt_float", _fixed(0.0, MAX_SETTLE_S), "s"), _P("frequencies_hz", "floats*")),
            ("f64[]", "f64[]", "f64[]"), True, "sweep", Capability.DRIVE_SWEEP,
            invoke=lambda c, a: _sweep_invoke(c, a), unpack=lambda a, f: SweepData(*f), check=_check_sweep,
            expected_s=lambda a, l: len(a[2]) * (a[1] if a[1] is not None else 0.05)),
    # motion
    Command("MOTion:Z", False, (_P("z_m", "float", _Z, "m"),), (), True, "move_z",
            invoke=lambda c, a: (c.move_z(a[0]), ())[1], expected_s=lambda a, l: l.z_range_m / l.z_speed_max_m_per_s),
    Command("MOTion:COARse", False, (_P("steps", "int", _fixed(-MAX_COARSE_STEPS, MAX_COARSE_STEPS)),), (),
            False, "step_coarse", Capability.COARSE_MOTOR, invoke=lambda c, a: (c.step_coarse(a[0]), ())[1],
            expected_s=lambda a, l: abs(a[0]) * 1e-3 if abs(a[0]) <= MAX_COARSE_STEPS else 0.0),  # else refused
    Command("MOTion:XY", False, (_P("x_m", "float", _XY, "m"), _P("y_m", "float", _XY, "m")), (), True,
            "move_xy", invoke=lambda c, a: (c.move_xy(a[0], a[1]), ())[1]),
    Command("MOTion:WITHdraw", False, (), (), True, "withdraw", invoke=lambda c, a: (c.withdraw(), ())[1],
            expected_s=lambda a, l: l.z_range_m / l.z_speed_max_m_per_s),
    # feedback
    Command("FEEDback:SET", False, (_P("enabled", "bool"), _P("setpoint_v", "opt_float"),
                                    _P("p_gain", "opt_float", _fixed(0.0, None)),
                                    _P("i_gain", "opt_float", _fixed(0.0, None))),
            (), True, "set_feedback",
            invoke=lambda c, a: (c.set_feedback(a[0], setpoint_v=a[1], p_gain=a[2], i_gain=a[3]), ())[1]),
    # imaging
    Command("SCAN:LINE", True,
            (_P("y_m", "float", _XY, "m"), _P("x_start_m", "float", _XY, "m"),
             _P("length_m", "float", _range(lambda l: 0.0, lambda l: l.scan_size_max_m), "m"),
             _P("pixels", "int", _fixed(1, MAX_PIXELS)),
             _P("line_rate_hz", "float", _fixed(1e-6, MAX_LINE_RATE_HZ), "Hz"), _P("passes", "floats*")),
            ("f64[]", "f32[]", "f32[]", "f32[]", "f32[]"), False, "scan_line", Capability.TWO_PASS_LINE,
            invoke=_scan_invoke, unpack=_scan_unpack, check=_check_passes,
            expected_s=lambda a, l: 2.0 * (1 + len(a[5]) // 2) / a[4]),
    Command("FORCe:CURVe", True, (_P("z_stop_m", "float", _Z, "m"), _P("points", "int", _fixed(2, MAX_PIXELS))),
            ("f64[]",) * 4, False, "force_curve", Capability.FORCE_CURVE,
            invoke=lambda c, a: _force_invoke(c, a), unpack=lambda a, f: ForceCurve(*f),
            expected_s=lambda a, l: 2.0 * l.z_range_m / l.z_speed_max_m_per_s),
    # bias, state
    Command("BIAS:VOLTage", False, (_P("bias_v", "float", _BIAS, "V"),), (), True, "set_bias",
            invoke=lambda c, a: (c.set_bias(a[0]), ())[1]),
    Command("STATus", True, (), ("bool", "float", "float", "float", "bool", "float", "float", "bool", "strs*"),
            True, "status", invoke=_status_invoke, unpack=_status_unpack),
    # applied field (an absolute target: repeating it leaves the magnet where one run would)
    Command("MAGNet:FIELd", False, (_P("field_a_per_m", "float", _FIELD, "A/m"),), (), True, "set_field",
            Capability.APPLIED_FIELD, invoke=lambda c, a: (c.set_field(a[0]), ())[1]),  # clients time the ramp
    Command("MAGNet:FIELd", True, (), ("float",), True, "read_field", Capability.APPLIED_FIELD,
            invoke=lambda c, a: (float(c.read_field()),), unpack=lambda a, f: f[0]),
)


def _sweep_invoke(c: Controller, a: tuple) -> tuple:
    data = c.sweep(np.asarray(a[2], float), a[0], settle_s=a[1])
    return (np.asarray(data.frequency_hz, float), np.asarray(data.amplitude_v, float),
            np.asarray(data.phase_deg, float))


def _force_invoke(c: Controller, a: tuple) -> tuple:
    fc = c.force_curve(a[0], a[1])
    return tuple(np.asarray(getattr(fc, k), float) for k in ("z_m", "deflection_v", "retract_z_m",
                                                              "retract_deflection_v"))


def _spellings(header: str) -> list[str]:
    if header.startswith("*"):
        return [header.upper()]
    forms: list[list[str]] = []
    for node in header.split(":"):
        short = "".join(ch for ch in node if not ch.islower())
        forms.append(sorted({short.upper(), node.upper()}))
    out = [""]
    for options in forms:
        out = [f"{p}:{o}" if p else o for p in out for o in options]
    return out


_BY_SPELLING: dict[tuple[str, bool], Command] = {
    (s, cmd.query): cmd for cmd in COMMANDS for s in _spellings(cmd.header)
}
BY_HEADER: dict[str, Command] = {cmd.spelling: cmd for cmd in COMMANDS}


def resolve(header: str, query: bool) -> Command:
    """The command a header names (short or long form, any case); -113 for anything else."""
    cmd = _BY_SPELLING.get((header.upper(), query))
    if cmd is None:
        known = _BY_SPELLING.get((header.upper(), not query))
        if known is not None:
            form = "a query" if known.query else "not a query"
            raise WireError(-113, f"{header} is {form}")
        raise WireError(-113, f"unknown header {header[:40]!r}")
    return cmd


def command(spelling: str) -> Command:
    """Look a command up by its canonical spelling, e.g. ``"MOTion:Z"`` or ``"STATus?"``."""
    return BY_HEADER[spelling]
