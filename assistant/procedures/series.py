"""The automated lift-height series: for every scan line a topography pass, then every second pass.

Per line the order is: first pass (topography under amplitude feedback), then for each lift height in
increasing order every tip bias, then (optionally) the first height again so that a tip-induced change of the
sample shows as a difference between the first and the last pass of the same line.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import asdict, dataclass, field

import numpy as np

from assistant.errors import AssistantError
from assistant.procedures.events import CancelToken, Notice, Progress, Sink, null_sink
from assistant.procedures.guard import SafetyLimits, safety_guard
from drivers.base import Capability, LineData, LineSpec, PassData, SecondPass
from drivers.errors import ProtocolError

DEFAULT_HEIGHTS_M = (10e-9, 15e-9, 20e-9, 30e-9, 50e-9, 75e-9, 100e-9)


class SeriesSettingsError(AssistantError, ValueError):
    """The series settings are inconsistent or outside a limit."""


@dataclass(frozen=True)
class SeriesSettings:
    """Everything that defines a lift-height series; stored as JSON in the session file for ``--resume``."""

    name: str = "series1"
    heights_m: tuple[float, ...] = DEFAULT_HEIGHTS_M
    biases_v: tuple[float, ...] | None = None  # biases at every height (>= 3 for a decomposition), or None
    bias_v: float = 0.0  # the tip bias of every second pass when there is no grid
    lines: int = 32
    pixels: int = 128
    scan_size_m: float = 4e-6
    line_rate_hz: float = 1.0
    repeat_first: bool = True
    x0_m: float = 0.0
    y0_m: float = 0.0
    phase_reference_deg: float = 0.0  # free-oscillation phase at the drive frequency, subtracted from every pass

    @property
    def order(self) -> str:
        bias = " × every bias" if self.biases_v else ""
        if self.repeat_first:
            return (f"per line: topography, the first height{bias}, its repeat, then the other heights in "
                    f"increasing order{bias}")
        return f"per line: topography, then each height in increasing order{bias}"

    @property
    def repeat_index(self) -> int | None:
        """Where the repeat of the first height stands among a line's second passes (None: no repeat): straight
        after the passes at the first (lowest) height. Their tip field is the strongest of the series, so whatever
        the tip switches it has switched by then, and the two passes compared lie seconds apart instead of a whole
        line (0.01 nm/s of drift over the 28 s of the default run's line moved the track edges enough to read as a
        change)."""
        return (len(self.biases_v) if self.biases_v else 1) if self.repeat_first else None

    @property
    def passes(self) -> tuple[SecondPass, ...]:
        biases = self.biases_v if self.biases_v else (self.bias_v,)
        passes = [SecondPass(h, b) for h in self.heights_m for b in biases]
        if self.repeat_index is not None:
            passes.insert(self.repeat_index, SecondPass(self.heights_m[0], biases[0]))
        return tuple(passes)

    @property
    def phase_shape(self) -> tuple[int, ...]:
        if self.biases_v:
            return (len(self.heights_m), len(self.biases_v), self.lines, self.pixels)
        return (len(self.heights_m), self.lines, self.pixels)

    def validate(self, limits: SafetyLimits, *, z_range_m: float | None = None,
                 scan_size_max_m: float | None = None) -> None:
        h = np.asarray(self.heights_m, dtype=float)
        if h.size < 1:
            raise SeriesSettingsError("at least one lift height is needed")
        if not np.all(np.isfinite(h)) or np.any(h <= 0):
            raise SeriesSettingsError(f"lift heights must be positive, got {', '.join(f'{x * 1e9:g}' for x in h)} nm")
        if np.any(np.diff(h) <= 0):
            raise SeriesSettingsError("lift heights must be strictly increasing")
        top = min(limits.lift_height_max_m, z_range_m / 2 if z_range_m else math.inf)
        if h[-1] > top:
            raise SeriesSettingsError(f"lift height {h[-1] * 1e9:g} nm exceeds the allowed {top * 1e9:g} nm")
        for b in self.biases_v or (self.bias_v,):
            limits.check_bias(b)
        if self.biases_v is not None:
            from assistant.analysis.imaging import DECOMPOSITION_MIN_HEIGHTS

            if len(self.biases_v) < 2:
                raise SeriesSettingsError(f"a list of biases needs at least two, got {len(self.biases_v)}; "
                                          "give a single bias as bias_v")
            if len(self.biases_v) < 3 and len(self.heights_m) >= DECOMPOSITION_MIN_HEIGHTS:
                # the decomposition fits the image mean with one bias, or as a parabola in bias (three or more)
                raise SeriesSettingsError(f"with {len(self.heights_m)} lift heights a bias grid needs at least "
                                          f"three biases, got {len(self.biases_v)}: give one bias, or three or more")
            if len(set(self.biases_v)) != len(self.biases_v):
                raise SeriesSettingsError("biases must be distinct")
        if self.pixels < 8:
            raise SeriesSettingsError(f"{self.pixels} pixels per line is below the minimum of 8")
        if self.lines < 8:  # the decomposition needs images of at least 8 x 8
            raise SeriesSettingsError(f"{self.lines} scan lines is below the minimum of 8")
        if not self.scan_size_m > 0:
            raise SeriesSettingsError(f"scan size {self.scan_size_m * 1e6:g} µm must be positive")
        if scan_size_max_m is not None and self.scan_size_m > scan_size_max_m:
            raise SeriesSettingsError(
                f"scan size {self.scan_size_m * 1e6:g} µm exceeds the scanner's {scan_size_max_m * 1e6:g} µm")
        if not self.line_rate_hz > 0:
            raise SeriesSettingsError(f"line rate {self.line_rate_hz:g} Hz must be positive")

    def to_dict(self) -> dict:
        """Every field, as stored in the session file (JSON types)."""
        return asdict(self)

    def to_json(self) -> str:
        return json.dumps(self.to_dict())

    @classmethod
    def from_dict(cls, d: dict) -> "SeriesSettings":
        """The settings :meth:`to_dict` gave (lists become tuples again)."""
        d = dict(d)
        d["heights_m"] = tuple(d["heights_m"])
        if d.get("biases_v") is not None:
            d["biases_v"] = tuple(d["biases_v"])
        return cls(**d)


@dataclass
class SeriesResult:
    name: str
    heights_m: tuple[float, ...]
    completed_lines: int
    lines: int
    elapsed_s: float
    notices: list[str] = field(default_factory=list)


def line_spec(settings: SeriesSettings, row: int) -> LineSpec:
    """The controller-level description of scan line ``row``."""
    step = settings.scan_size_m / settings.lines
    return LineSpec(
        y_m=settings.y0_m + (row + 0.5) * step,
        x_start_m=settings.x0_m,
        length_m=settings.scan_size_m,
        pixels=settings.pixels,
        line_rate_hz=settings.line_rate_hz,
        passes=settings.passes,
    )


def scan_line_generic(controller, spec: LineSpec) -> LineData:
    """Two-pass line for controllers without native support: point by point with ``move_xy`` and ``read``.

    Slow (one round trip per pixel and pass) but correct on any controller that implements the basic interface.
    """
    xs = spec.x_start_m + (np.arange(spec.pixels) + 0.5) * spec.length_m / spec.pixels
    topo_z = np.empty(spec.pixels)
    err = np.empty(spec.pixels)
    controller.set_feedback(True)
    for j, x in enumerate(xs):
        controller.move_xy(float(x), spec.y_m)
        r = controller.read(["z_m", "amplitude_v"])
        topo_z[j], err[j] = r["z_m"], r["amplitude_v"]
    controller.set_feedback(False)
    passes = []
    for p in spec.passes:
        controller.set_bias(p.bias_v)
        phase = np.empty(spec.pixels)
        amp = np.empty(spec.pixels)
        for j, x in enumerate(xs):
            controller.move_xy(float(x), spec.y_m)
            controller.move_z(float(topo_z[j] - p.lift_height_m))  # z is extension towards the sample
            r = controller.read(["phase_deg", "amplitude_v"])
            phase[j], amp[j] = r["phase_deg"], r["amplitude_v"]
        passes.append(PassData(p.lift_height_m, p.bias_v, phase, amp))
    controller.set_bias(0.0)
    controller.set_feedback(True)
    # Topography in the usual sign: higher surface -> less extension needed -> larger height
    return LineData(topography_m=-(topo_z - topo_z.mean()), amplitude_error_v=err, passes=passes)


def _arrange(settings: SeriesSettings, data: LineData) -> tuple[np.ndarray, np.ndarray, np.ndarray | None,
                                                                  np.ndarray | None]:
    """Sort the passes of one line into (heights[, biases], pixels) arrays plus the repeat pass."""
    nb = len(settings.biases_v) if settings.biases_v else 1
    nh = len(settings.heights_m)
    expected = nh * nb + (1 if settings.repeat_first else 0)
    if len(data.passes) != expected:
        raise ProtocolError(f"controller returned {len(data.passes)} second passes, expected {expected}")
    ref = settings.phase_reference_deg
    passes = list(data.passes)
    repeat_pass = passes.pop(settings.repeat_index) if settings.repeat_index is not None else None
    phase = np.array([p.phase_deg for p in passes], dtype=float) - ref
    amp = np.array([p.amplitude_v for p in passes], dtype=float)
    fshift = None
    if all(p.frequency_shift_hz is not None for p in passes):
        fshift = np.array([p.frequency_shift_hz for p in passes], dtype=float)
    shape = (nh, nb, settings.pixels) if settings.biases_v else (nh, settings.pixels)
    phase, amp = phase.reshape(shape), amp.reshape(shape)
    if fshift is not None:
        fshift = fshift.reshape(shape)
    repeat = np.asarray(repeat_pass.phase_deg, dtype=float) - ref if repeat_pass is not None else None
    return phase, amp, fshift, repeat


def run_series(controller, settings: SeriesSettings, writer, *, limits: SafetyLimits | None = None,
               sink: Sink = null_sink, cancel: CancelToken | None = None, start_line: int = 0) -> SeriesResult:
    """Scan ``settings.lines`` lines from ``start_line`` on, writing each line through ``writer`` as it comes.

    ``writer`` is a session-file series writer (``write_line(index, ...)``, flushed per line). The stage must be
    engaged (see the approach procedure). Runs inside the safety guard.
    """
    limits = limits or SafetyLimits()
    cancel = cancel or CancelToken()
    settings.validate(limits, z_range_m=controller.limits.z_range_m, scan_size_max_m=controller.limits.scan_size_max_m)
    native = controller.has(Capability.TWO_PASS_LINE)
    if not native:
        sink(Notice("info", "controller has no native two-pass line: using the point-by-point fallback"))
    t0 = time.monotonic()
    done = start_line
    per_line_s = (1 + len(settings.passes)) / settings.line_rate_hz
    with safety_guard(controller, sink=sink):
        for row in range(start_line, settings.lines):
            cancel.raise_if_set()
            status = controller.read(["sum_v"])
            limits.check_sum(status["sum_v"])
            spec = line_spec(settings, row)
            data = controller.scan_line(spec) if native else scan_line_generic(controller, spec)
            phase, amp, fshift, repeat = _arrange(settings, data)
            writer.write_line(row, topography_m=np.asarray(data.topography_m, dtype=float), phase_deg=phase,
                              amplitude_v=amp, frequency_shift_hz=fshift, repeat_phase_deg=repeat)
            done = row + 1
            elapsed = time.monotonic() - t0
            lines_done_now = done - start_line
            rate = elapsed / lines_done_now
            remaining_virtual = (settings.lines - done) * per_line_s
            sink(Progress("series", done, settings.lines, "lines", elapsed,
                          remaining_s=max(rate * (settings.lines - done), 0.0),
                          data={"row": row, "phase_deg": phase, "topography_m": data.topography_m,
                                "heights_m": settings.heights_m, "instrument_remaining_s": remaining_virtual}))
        controller.set_bias(0.0)
    return SeriesResult(settings.name, settings.heights_m, done, settings.lines, time.monotonic() - t0)
