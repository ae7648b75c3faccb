"""The field series: the tip engaged once, then for every applied-field step the magnet ramps and settles and
a two-pass image is taken at one lift height (topography, the lift pass, and the repeat of the lift pass at
the end of each line, which shows elements the tip switched).

Safety: the field is part of the safe state. The body runs inside the safety guard, whose stop (the
controller's ``abort()``, a make-safe) brings the field back to zero after the withdraw, the drive off and the
bias at zero; a normal end sets the field to zero as well. Fields are checked against the software limit and the
magnet's hard limit before anything moves.

Resuming after a kill: the magnetic state of the elements (and of the tip) depends on the fields visited, not
only on the present one, so before the interrupted step the magnet retraces the turning points of the fields
already applied (return-point memory of independent hysteretic elements; the zero field a stop leaves behind
is inside every loop that starts saturated, so it erases nothing of it).
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import asdict, dataclass, field

import numpy as np

from assistant.errors import AssistantError, InputError
from assistant.formatting import number_list, quantity
from assistant.procedures.events import CancelToken, Notice, Progress, Sink, null_sink
from assistant.procedures.guard import SafetyError, SafetyLimits, safety_guard
from assistant.procedures.series import scan_line_generic
from drivers.base import Capability, LineSpec, SecondPass

MIN_FIELD_STEPS = 3
FIELD_TOLERANCE = 0.02  # a settled field may read this fraction of the full range off (rule of thumb, no source)


class FieldSeriesSettingsError(InputError):
    """The field-series settings are inconsistent or outside a limit."""


class MagnetFault(AssistantError, RuntimeError):
    """The magnet's field does not read what it was set to."""


def parse_fields_ka_per_m(text: str) -> tuple[float, ...]:
    """Field steps [kA/m] from ``"400,0,-400"`` or ``"START:STOP:STEP"`` (from START to STOP in steps of
    |STEP| and back to START, the turning point once)."""
    text = text.strip()
    if ":" in text:
        parts = text.split(":")
        if len(parts) != 3:
            raise FieldSeriesSettingsError(f"{text!r}: a range is START:STOP:STEP")
        try:
            start, stop, step = (float(p) for p in parts)
        except ValueError:
            raise FieldSeriesSettingsError(f"{text!r}: START:STOP:STEP must be numbers") from None
        if not all(math.isfinite(v) for v in (start, stop, step)) or step == 0:
            raise FieldSeriesSettingsError(f"{text!r}: START, STOP and a non-zero STEP must be finite")
        n = int(math.floor(abs(stop - start) / abs(step) + 1e-9))
        way = np.linspace(start, start + math.copysign(n * abs(step), stop - start), n + 1)
        if not math.isclose(way[-1], stop, rel_tol=0, abs_tol=1e-9 * max(1.0, abs(stop))):
            way = np.append(way, stop)
        return tuple(float(v) for v in np.concatenate([way, way[-2::-1]]))
    try:
        values = tuple(float(t) for t in text.replace(";", ",").split(",") if t.strip())
    except ValueError:
        raise FieldSeriesSettingsError(f"{text!r} is not a list of fields in kA/m nor START:STOP:STEP") from None
    if not all(math.isfinite(v) for v in values):
        raise FieldSeriesSettingsError(f"{text!r}: fields must be finite")
    return values


def turning_points(fields_a_per_m, upto: int) -> list[float]:
    """The first field and every extreme where the direction reverses among the fields before step ``upto``,
    then the last of them; a field repeated at consecutive steps counts once (an extreme held for two steps is
    still an extreme)."""
    h: list[float] = []
    for v in fields_a_per_m[:upto]:
        if not h or float(v) != h[-1]:
            h.append(float(v))
    out: list[float] = h[:1]
    for i in range(1, len(h) - 1):
        if (h[i] - h[i - 1]) * (h[i + 1] - h[i]) < 0:
            out.append(h[i])
    if len(h) > 1:
        out.append(h[-1])
    return out


@dataclass(frozen=True)
class FieldSeriesSettings:
    """Everything that defines a field series; stored as JSON in the session file for a resume
    (:class:`assistant.procedures.workflow.ResumePlan`)."""

    name: str = "fields1"
    fields_a_per_m: tuple[float, ...] = ()
    lift_height_m: float = 50e-9
    bias_v: float = 0.0
    lines: int = 32
    pixels: int = 64
    scan_size_m: float = 3e-6
    line_rate_hz: float = 1.0
    repeat_first: bool = True
    field_axis: str = "z"  # the magnet's axis: out of plane; in-plane magnets are not supported yet
    x0_m: float = 0.0
    y0_m: float = 0.0
    phase_reference_deg: float = 0.0  # free-oscillation phase at the drive frequency, subtracted from every pass

    @property
    def order(self) -> str:
        rep = ", repeat of the lift pass" if self.repeat_first else ""
        return f"per field step: ramp, settle, then per line: topography, lift pass{rep}"

    @property
    def passes(self) -> tuple[SecondPass, ...]:
        one = SecondPass(self.lift_height_m, self.bias_v)
        return (one, one) if self.repeat_first else (one,)

    def validate(self, limits: SafetyLimits, *, controller_limits=None) -> None:
        """Refuse settings that break a software limit or, given ``controller_limits``, a hard limit."""
        try:
            self._validate(limits, controller_limits)
        except SafetyError as exc:  # bad settings, whichever limit they break
            raise FieldSeriesSettingsError(str(exc)) from None

    def _validate(self, limits: SafetyLimits, controller_limits) -> None:
        h = np.asarray(self.fields_a_per_m, dtype=float)
        if h.size < MIN_FIELD_STEPS:
            raise FieldSeriesSettingsError(f"a field series needs at least {MIN_FIELD_STEPS} field steps, got {h.size}")
        if not np.all(np.isfinite(h)):
            raise FieldSeriesSettingsError("fields must be finite")
        if np.all(h == h[0]):
            raise FieldSeriesSettingsError("the fields are all the same: there is no loop to measure")
        if self.field_axis != "z":
            raise FieldSeriesSettingsError(f"field axis {self.field_axis!r}: only out-of-plane magnets ('z') are "
                                           f"supported so far")
        top = float(np.max(np.abs(h)))
        limits.check_field(top)
        if controller_limits is not None and top > controller_limits.field_max_a_per_m:
            raise FieldSeriesSettingsError(
                f"field {quantity(top, 'A/m')} exceeds the magnet's limit of "
                f"{quantity(controller_limits.field_max_a_per_m, 'A/m')}")
        limits.check_lift(self.lift_height_m)
        if controller_limits is not None and self.lift_height_m > controller_limits.z_range_m / 2:
            raise FieldSeriesSettingsError(f"lift height {self.lift_height_m * 1e9:g} nm exceeds half the Z range")
        limits.check_bias(self.bias_v)
        if self.pixels < 8 or self.lines < 8:
            raise FieldSeriesSettingsError(f"images of {self.lines} lines x {self.pixels} pixels are too small "
                                           f"(at least 8 x 8)")
        if not self.scan_size_m > 0:
            raise FieldSeriesSettingsError(f"scan size {self.scan_size_m * 1e6:g} µm must be positive")
        if controller_limits is not None and self.scan_size_m > controller_limits.scan_size_max_m:
            raise FieldSeriesSettingsError(f"scan size {self.scan_size_m * 1e6:g} µm exceeds the scanner's "
                                           f"{controller_limits.scan_size_max_m * 1e6:g} µm")
        if not self.line_rate_hz > 0:
            raise FieldSeriesSettingsError(f"line rate {self.line_rate_hz:g} Hz must be positive")

    def to_dict(self) -> dict:
        """Every field, as stored in the session file (JSON types)."""
        return asdict(self)

    def to_json(self) -> str:
        return json.dumps(self.to_dict())

    @classmethod
    def from_dict(cls, d: dict) -> "FieldSeriesSettings":
        """The settings :meth:`to_dict` gave (lists become tuples again)."""
        d = dict(d)
        d["fields_a_per_m"] = tuple(d["fields_a_per_m"])
        return cls(**d)


@dataclass
class FieldSeriesResult:
    name: str
    fields_a_per_m: tuple[float, ...]
    measured_field_a_per_m: list[float]
    completed_lines: int
    lines: int
    elapsed_s: float
    notices: list[str] = field(default_factory=list)

    @property
    def completed_steps(self) -> int:
        return self.completed_lines // self.lines


def _line_spec(settings: FieldSeriesSettings, row: int) -> LineSpec:
    step = settings.scan_size_m / settings.lines
    return LineSpec(y_m=settings.y0_m + (row + 0.5) * step, x_start_m=settings.x0_m, length_m=settings.scan_size_m,
                    pixels=settings.pixels, line_rate_hz=settings.line_rate_hz, passes=settings.passes)


def settle_field(controller, field_a_per_m: float) -> float:
    """Set the field, wait for the magnet (the controller returns once it has settled) and check the reading."""
    controller.set_field(float(field_a_per_m))
    measured = float(controller.read_field())
    allowed = FIELD_TOLERANCE * max(controller.limits.field_max_a_per_m, abs(field_a_per_m), 1.0)
    if not abs(measured - field_a_per_m) <= allowed:  # also catches NaN
        raise MagnetFault(f"the magnet reads {quantity(measured, 'A/m')} after being set to "
                          f"{quantity(field_a_per_m, 'A/m')} (allowed {quantity(allowed, 'A/m', digits=3)} off)")
    return measured


def check_controller(controller, settings: FieldSeriesSettings, limits: SafetyLimits) -> None:
    """The controller must have a magnet along the series' axis whose limits allow the series."""
    if not controller.has(Capability.APPLIED_FIELD):
        raise FieldSeriesSettingsError(f"{controller.info.model} has no magnet (capability "
                                       f"{Capability.APPLIED_FIELD.value}): a field series needs one")
    if controller.field_axis != settings.field_axis:
        raise FieldSeriesSettingsError(f"the magnet's axis is {controller.field_axis!r}, the series asks for "
                                       f"{settings.field_axis!r}")
    settings.validate(limits, controller_limits=controller.limits)


def run_field_series(controller, settings: FieldSeriesSettings, writer, *, limits: SafetyLimits | None = None,
                     sink: Sink = null_sink, cancel: CancelToken | None = None) -> FieldSeriesResult:
    """Image every field step from the writer's next line on (a fresh series, or a resumed one).

    ``writer`` is a session-file field-series writer (flushed per line). The stage must be engaged. Runs inside
    the safety guard; a normal end leaves the field and the bias at zero and the tip engaged.
    """
    limits = limits or SafetyLimits()
    cancel = cancel or CancelToken()
    check_controller(controller, settings, limits)
    native = controller.has(Capability.TWO_PASS_LINE)
    fields = settings.fields_a_per_m
    first_step, first_line = writer.next_step_line
    total = len(fields) * settings.lines
    t0 = time.monotonic()
    measured: list[float] = []
    per_line_s = (1 + len(settings.passes)) / settings.line_rate_hz
    with safety_guard(controller, sink=sink):
        if first_step or first_line:
            history = turning_points(fields, first_step)
            retrace = f": retracing the fields {number_list(history, 'A/m')} first" if history else ""
            sink(Notice("info", f"resuming at field step {first_step + 1} line {first_line + 1}{retrace}"))
            for h in history:
                cancel.raise_if_set()
                settle_field(controller, h)
        for step in range(first_step, len(fields)):
            cancel.raise_if_set()
            reading = settle_field(controller, fields[step])
            measured.append(reading)
            start_line = first_line if step == first_step else 0
            if start_line == 0:
                writer.write_field(step, reading)
            for row in range(start_line, settings.lines):
                cancel.raise_if_set()
                limits.check_sum(controller.read(["sum_v"])["sum_v"])
                spec = _line_spec(settings, row)
                data = controller.scan_line(spec) if native else scan_line_generic(controller, spec)
                if len(data.passes) != len(settings.passes):
                    raise RuntimeError(f"controller returned {len(data.passes)} second passes, expected "
                                       f"{len(settings.passes)}")
                ref = settings.phase_reference_deg
                phase = np.asarray(data.passes[0].phase_deg, dtype=float) - ref
                repeat = np.asarray(data.passes[1].phase_deg, dtype=float) - ref if settings.repeat_first else None
                writer.write_line(step, row, topography_m=np.asarray(data.topography_m, dtype=float),
                                  phase_deg=phase, amplitude_v=np.asarray(data.passes[0].amplitude_v, dtype=float),
                                  repeat_phase_deg=repeat)
                done = step * settings.lines + row + 1
                elapsed = time.monotonic() - t0
                rate = elapsed / max(done - first_step * settings.lines - first_line, 1)
                sink(Progress("field series", done, total, "lines", elapsed, remaining_s=rate * (total - done),
                              data={"step": step, "row": row, "field_a_per_m": fields[step],
                                    "measured_field_a_per_m": reading, "phase_deg": phase,
                                    "topography_m": np.asarray(data.topography_m, dtype=float),
                                    "fields_a_per_m": fields, "lines": settings.lines, "pixels": settings.pixels,
                                    "step_complete": row == settings.lines - 1,
                                    "instrument_remaining_s": (total - done) * per_line_s}))
        controller.set_field(0.0)
        controller.set_bias(0.0)
    return FieldSeriesResult(settings.name, fields, measured, writer.completed_lines, settings.lines,
                             time.monotonic() - t0)
