"""The in-process simulated controller: the Controller interface over the virtual microscope.

URL form: ``sim://?scenario=NAME_OR_FILE&seed=N&pace=fast|realtime&line_rate=HZ`` (every part optional;
``scenario`` and ``seed`` may also be passed as keyword options, which win over the URL). ``line_rate`` is the
line rate used when a LineSpec asks for ``line_rate_hz <= 0``. Errors of the stage are mapped onto the
controller error tree; every reply is in SI units.

Every call holds one lock on the stage; :meth:`SimulatedController.abort` interrupts the stage's clock, so the
call in flight stops at its next step (a servo sample of a scan line, a point of a sweep, a sample of a record)
and raises :class:`drivers.errors.Aborted`, then makes the stage safe under the lock.
"""

from __future__ import annotations

import functools
import threading
from collections.abc import Iterator, Sequence
from dataclasses import asdict, fields
from typing import TYPE_CHECKING, Any
from urllib.parse import parse_qs, urlsplit

import numpy as np

from drivers.base import (Capability, Controller, ControllerInfo, ForceCurve, LineData, Limits, LineSpec, PassData,
                          Status, SweepData)
from drivers.errors import Aborted, BadURL, ControllerFault, LaserLost, LimitExceeded
from drivers.fault_plan import STAGE_KINDS, FaultPlan
from drivers.link_faults import gate_for
from simulated_stage.clock import PACES, VirtualClock
from simulated_stage.errors import LASER_LOST, ScenarioError, StageAborted, StageError, StageFault, StageLimitError
from simulated_stage.faults import FaultyStage

if TYPE_CHECKING:  # the stage's physics (scipy) loads when a controller is opened, not with the plug-in
    from simulated_stage.scenario import Scenario

_URL_KEYS = ("scenario", "seed", "pace", "line_rate")
_MAX_LAG_S = 0.005  # realtime pace: host time lost before a call is not caught up beyond this
STAGE_ERROR_CODE = -300  # SCPI "device-specific error" for stage errors without a code of their own


def _mapped(method):
    """Translate stage errors into the controller error tree (the stage knows nothing of drivers)."""

    @functools.wraps(method)
    def call(self, *args, **kwargs):
        with self._lock:
            clock = getattr(self.stage, "clock", None)
            if clock is not None:
                clock.begin()  # realtime: this call takes its own duration, whatever the host did before
            try:
                return method(self, *args, **kwargs)
            except StageError as exc:
                raise _translated(exc) from exc

    return call


def _translated(exc: StageError) -> Exception:
    """The driver-level error for a stage error."""
    if isinstance(exc, StageLimitError):
        return LimitExceeded(exc.quantity, exc.value, exc.low, exc.high, exc.unit)
    if isinstance(exc, StageAborted):
        return Aborted(f"stopped by abort: {exc}")
    if isinstance(exc, StageFault):
        cls = LaserLost if exc.code == LASER_LOST else ControllerFault
        return cls(exc.code, str(exc).split(": ", 1)[-1])
    return ControllerFault(STAGE_ERROR_CODE, str(exc))


class SimulatedController(Controller):
    """Controller over a :class:`simulated_stage.instrument.VirtualMicroscope` (or any object with its API,
    such as the fault injector's proxy around one)."""

    schemes = ("sim",)
    capabilities = frozenset(Capability)

    def __init__(self, stage: Any, *, scenario: Scenario | None = None, seed: int = 0,
                 default_line_rate_hz: float = 1.0) -> None:
        self.stage = stage
        self.scenario = scenario
        self.seed = seed
        self.default_line_rate_hz = default_line_rate_hz
        known = {f.name for f in fields(Limits)}  # the stage may know more limits than the interface
        self.limits = Limits(**{k: v for k, v in asdict(stage.limits).items() if k in known})
        if self.limits.field_max_a_per_m <= 0:  # a scenario without a magnet under the sample
            self.capabilities = frozenset(Capability) - {Capability.APPLIED_FIELD}
        name = scenario.name if scenario is not None else "custom"
        self.info = ControllerInfo("mfm-assistant", "virtual microscope", f"sim-{name}-{seed}", "1.0")
        self._closed = False
        self._lock = threading.RLock()  # one call at a time; abort() waits here for the interrupted call
        self._aborts = 0  # counts abort() calls: a record in progress stops at its next chunk
        #: the scenario's fault plan (link and writing-side faults are applied by the server and the session
        #: writer; the stage-level ones are already wrapped around ``stage``)
        self.fault_plan: FaultPlan | None = None

    def writer_fault_hook(self):
        """For the session writer: a callable(line_index) that raises ``OSError(ENOSPC)`` when the scenario's
        ``disk_full`` fault fires, or None when the scenario injects no such fault."""
        if self.fault_plan is None or not self.fault_plan.only({"disk_full"}).faults:
            return None
        gate = gate_for(self.fault_plan)
        return lambda line_index: gate.check()

    @property
    def scenario_text(self) -> str | None:
        """The scenario's TOML, kept in the session file so a simulated session can be reproduced."""
        return getattr(self.scenario, "text", None)

    @classmethod
    def from_url(cls, url: str = "sim://", **options: object) -> "SimulatedController":
        parts = urlsplit(url)
        if parts.scheme.lower() not in cls.schemes:
            raise BadURL(f"controller URL {url!r} is not a sim:// URL")
        query = {k: v[-1] for k, v in parse_qs(parts.query, keep_blank_values=True).items()}
        for key in query:
            if key not in _URL_KEYS:
                raise BadURL(f"unknown option {key!r} in {url!r}; allowed: {', '.join(_URL_KEYS)}")
        allowed = set(_URL_KEYS) | {"clock", "sample", "faults"}
        for key in options:
            if key not in allowed:
                raise BadURL(f"unknown option {key!r} for sim://; allowed: {', '.join(sorted(allowed))}")
        merged: dict[str, Any] = {**query, **{k: v for k, v in options.items() if v is not None}}
        try:
            seed = int(merged.get("seed", 0))
        except (TypeError, ValueError):
            raise BadURL(f"seed = {merged.get('seed')!r} must be an integer") from None
        pace = str(merged.get("pace", "fast"))
        if pace not in PACES:
            raise BadURL(f"pace = {pace!r} must be one of {', '.join(PACES)}")
        try:
            line_rate = float(merged.get("line_rate", 1.0))
        except (TypeError, ValueError):
            raise BadURL(f"line_rate = {merged.get('line_rate')!r} must be a number in Hz") from None
        if not 0 < line_rate <= 1000:
            raise BadURL(f"line_rate = {line_rate:g} Hz is outside (0, 1000] Hz")
        scenario = merged.get("scenario", "default")
        from simulated_stage.scenario import Scenario, build_microscope, load_scenario

        try:
            if not isinstance(scenario, Scenario):
                scenario = load_scenario(str(scenario))
            # realtime: every call takes its own duration, so the stage can be timed from outside
            clock = merged.get("clock") or VirtualClock(pace, max_lag_s=_MAX_LAG_S)
            stage = build_microscope(scenario, seed=seed, clock=clock, sample=merged.get("sample"))
            plan = FaultPlan.from_table(scenario.faults) if scenario.faults else None
            extra = merged.get("faults")  # a FaultPlan handed in by a caller (e.g. ``mfma serve --faults``)
            if extra is not None:
                plan = extra if plan is None else FaultPlan(plan.faults + extra.faults, plan.seed)
        except ScenarioError as exc:
            raise BadURL(f"scenario: {exc}") from exc
        if plan is not None and plan.only(STAGE_KINDS).faults:
            stage = FaultyStage(stage, plan.schedule(STAGE_KINDS))
        ctl = cls(stage, scenario=scenario, seed=seed, default_line_rate_hz=line_rate)
        ctl.fault_plan = plan
        return ctl

    # ---- signals -------------------------------------------------------------------------------------
    @_mapped
    def read(self, channels: Sequence[str]) -> dict[str, float]:
        return {k: float(v) for k, v in self.stage.read(list(channels)).items()}

    @_mapped
    def record_deflection(self, samples: int, rate_hz: float, *, chunk: int = 1 << 18) -> Iterator[np.ndarray]:
        return self._chunks(self.stage.record_deflection(samples, rate_hz, chunk=chunk))

    def _chunks(self, source: Iterator[np.ndarray]) -> Iterator[np.ndarray]:
        it = iter(source)
        aborts = self._aborts
        while True:
            with self._lock:
                if self._aborts != aborts:  # the record was stopped between two chunks
                    raise Aborted("deflection record stopped by abort")
                try:
                    chunk = next(it)
                except StopIteration:
                    return
                except StageError as exc:
                    raise _translated(exc) from exc
            yield chunk

    # ---- drive and lock-in ---------------------------------------------------------------------------
    @_mapped
    def set_drive(self, frequency_hz: float, amplitude_v: float) -> None:
        self.stage.set_drive(float(frequency_hz), float(amplitude_v))

    @_mapped
    def drive_off(self) -> None:
        self.stage.drive_off()

    @_mapped
    def set_lockin_time_constant(self, seconds: float) -> None:
        self.stage.set_lockin_time_constant(float(seconds))

    @_mapped
    def sweep(self, frequencies_hz: np.ndarray, amplitude_v: float, *, settle_s: float | None = None) -> SweepData:
        r = self.stage.sweep(np.asarray(frequencies_hz, dtype=float), float(amplitude_v), settle_s=settle_s)
        return SweepData(np.asarray(r.frequency_hz), np.asarray(r.amplitude_v), np.asarray(r.phase_deg))

    # ---- motion --------------------------------------------------------------------------------------
    @_mapped
    def move_z(self, z_m: float) -> None:
        self.stage.move_z(float(z_m))

    @_mapped
    def step_coarse(self, steps: int) -> None:
        self.stage.step_coarse(int(steps))

    @_mapped
    def move_xy(self, x_m: float, y_m: float) -> None:
        self.stage.move_xy(float(x_m), float(y_m))

    def withdraw(self) -> None:
        with self._lock:
            self.stage.withdraw()  # the stage's withdraw never raises

    @_mapped
    def set_feedback(self, enabled: bool, *, setpoint_v: float | None = None, p_gain: float | None = None,
                     i_gain: float | None = None) -> None:
        self.stage.set_feedback(bool(enabled), setpoint_v=setpoint_v, p_gain=p_gain, i_gain=i_gain)

    # ---- imaging -------------------------------------------------------------------------------------
    @_mapped
    def scan_line(self, spec: LineSpec) -> LineData:
        rate = spec.line_rate_hz if spec.line_rate_hz > 0 else self.default_line_rate_hz
        r = self.stage.scan_line(y_m=spec.y_m, x_start_m=spec.x_start_m, length_m=spec.length_m,
                                 pixels=spec.pixels, line_rate_hz=rate,
                                 passes=[(p.lift_height_m, p.bias_v) for p in spec.passes])
        passes = [PassData(p.lift_height_m, p.bias_v, np.asarray(p.phase_deg), np.asarray(p.amplitude_v),
                           np.asarray(p.frequency_shift_hz)) for p in r.passes]
        return LineData(np.asarray(r.topography_m), np.asarray(r.amplitude_error_v), passes)

    @_mapped
    def force_curve(self, z_stop_m: float, points: int) -> ForceCurve:
        r = self.stage.force_curve(float(z_stop_m), int(points))
        return ForceCurve(r.z_m, r.deflection_v, r.retract_z_m, r.retract_deflection_v)

    # ---- bias, state ---------------------------------------------------------------------------------
    @_mapped
    def set_bias(self, bias_v: float) -> None:
        self.stage.set_bias(float(bias_v))

    def abort(self) -> None:
        """Interrupt the call in flight at its next step of virtual time, then withdraw, drive off, bias 0 V and,
        with a magnet, field 0 (an interrupted field ramp leaves the field where it was before that ramp)."""
        self._aborts += 1
        clock = getattr(self.stage, "clock", None)
        if clock is not None:
            clock.interrupt()
        with self._lock:  # the interrupted call has returned (or none was running)
            if clock is not None:
                clock.resume()
            self.make_safe()

    @_mapped
    def set_field(self, field_a_per_m: float) -> None:
        if not self.has(Capability.APPLIED_FIELD):  # a scenario without a magnet: the interface's promise
            super().set_field(field_a_per_m)
            return
        self.stage.set_field(float(field_a_per_m))

    @_mapped
    def read_field(self) -> float:
        if not self.has(Capability.APPLIED_FIELD):
            return super().read_field()
        return float(self.stage.read_field())

    def status(self) -> Status:
        with self._lock:
            s = self.stage.status()
        return Status(bool(s.engaged), float(s.z_m), float(s.coarse_position_m), float(s.bias_v), bool(s.drive_on),
                      float(s.drive_frequency_hz), float(s.drive_amplitude_v), bool(s.feedback_on), tuple(s.faults))

    def probe_hint(self) -> dict[str, float] | None:
        """Plan-view length and width of the simulated lever (what an optical microscope shows, so the Sader method
        can use them) and the catalogue's nominal k and f0 (rounded, never a calibration)."""
        lever = self.stage.lever
        return {"length_m": lever.length_m, "width_m": lever.width_m,
                "resonance_hz": float(f"{lever.resonance_hz:.2g}"),
                "spring_constant_n_per_m": float(f"{lever.spring_constant_n_per_m:.1g}"),
                "temperature_k": float(self.stage.temperature_k)}  # the enclosure's thermometer

    def close(self) -> None:
        self._closed = True
