"""A whole session, step by step: calibrate, approach, series (or field series), analyse (the report is built
by the caller from the session file, with ``assistant.report.summary.build_report``).

The command line (``mfma run``) calls the steps in order; the terminal UI calls them one at a time from its
views. Both go through this class, so there is one code path. Each step writes what it measured to the
session file before returning. An interrupted session is continued with :meth:`Workflow.resume`.
"""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

from assistant import __version__
from assistant.errors import AssistantError
from assistant.procedures.approach import ApproachResult, ApproachSettings, approach
from assistant.procedures.calibrate import CalibrationResult, CalibrationSettings, DriveSettings, calibrate
from assistant.procedures.events import CancelToken, Notice, Sink, null_sink
from assistant.procedures.field_series import (FieldSeriesResult, FieldSeriesSettings, check_controller,
                                               run_field_series)
from assistant.procedures.guard import SafetyLimits, safety_guard
from assistant.procedures.series import SeriesResult, SeriesSettings, run_series


#: What the workflow stores beside the series settings, so that a resume needs no new calibration.
CALIBRATION_KEYS = ("drive", "spring_constant_n_per_m", "quality_factor", "temperature_k")


class WorkflowError(AssistantError, RuntimeError):
    """A step was asked for before the step it needs (e.g. a series before the approach)."""


@dataclass(frozen=True)
class ResumePlan:
    """What continuing an interrupted session needs, read from its file before any controller is opened.

    ``stage`` says what is left (:func:`assistant.procedures.resume.read_resume_plan` decides it): ``"start"``
    (stopped before its series began: the run plan's ``calibration`` and ``series``), ``"scan"`` (the unfinished
    series, with the drive, k, Q and temperature stored with it) or ``"analyse"`` (every line written, the
    analysis and the report not). The series is a lift series or a field series (:attr:`is_field_series`);
    ``completed_lines`` counts the lines of every field step of a field series. ``scenario_text`` is the
    simulated stage's scenario the file was recorded on. ``calibration`` is the run plan's at every stage where the
    file has one (a later stage uses the stored drive, k and Q instead; ``mfma run --resume`` compares options).
    """

    path: Path
    series: SeriesSettings | FieldSeriesSettings
    completed_lines: int
    drive: DriveSettings | None
    spring_constant_n_per_m: float | None
    quality_factor: float | None
    temperature_k: float
    stage: str = "scan"
    calibration: CalibrationSettings | None = None
    probe_record: bool = False
    scenario_text: str | None = None

    @classmethod
    def read(cls, path: str | Path) -> "ResumePlan":
        """Read the plan; a complete session, or a file with neither a series nor a run plan, is refused."""
        from assistant.procedures.resume import read_resume_plan

        return read_resume_plan(path)

    @property
    def is_field_series(self) -> bool:
        return isinstance(self.series, FieldSeriesSettings)

    @property
    def where(self) -> str:
        """Where the series goes on, in words (``line 5 of 32``; ``field step 4 of 9, line 17 of 24``)."""
        if self.is_field_series:
            step, line = divmod(self.completed_lines, self.series.lines)
            steps = len(self.series.fields_a_per_m)
            return f"field step {step + 1} of {steps}, line {line + 1} of {self.series.lines}"
        return f"line {self.completed_lines + 1} of {self.series.lines}"


@dataclass
class Workflow:
    controller: object
    session_path: Path
    controller_url: str = "sim://"
    scenario_text: str | None = None
    limits: SafetyLimits = field(default_factory=SafetyLimits)
    sink: Sink = null_sink
    cancel: CancelToken = field(default_factory=CancelToken)
    fsync: bool = False
    before_write: object | None = None  # hook called before each line is written (fault injection)
    run_plan_json: str | None = None  # what the run was asked to do, kept in the session file from its creation
    calibration: CalibrationResult | None = None
    drive: DriveSettings | None = None
    spring_constant_n_per_m: float | None = None
    quality_factor: float | None = None
    temperature_k: float = 295.15
    approach_result: ApproachResult | None = None
    series_settings: SeriesSettings | None = None
    series_result: SeriesResult | None = None
    analysis: object | None = None
    probe_warnings: list[str] = field(default_factory=list)
    field_map_result: object | None = None
    field_settings: FieldSeriesSettings | None = None
    field_result: FieldSeriesResult | None = None
    loop_analysis: object | None = None
    _session: object | None = None

    # ---- session file --------------------------------------------------------------------------------
    @property
    def session(self):
        if self._session is None:
            from assistant.storage.session_file import SessionFile

            self.session_path.parent.mkdir(parents=True, exist_ok=True)
            self._session = SessionFile.create(self.session_path, controller_url=self.controller_url,
                                               scenario_text=self.scenario_text, software_version=__version__,
                                               fsync=self.fsync, run_plan_json=self.run_plan_json)
        return self._session

    def close(self) -> None:
        if self._session is not None:
            self._session.close()
            self._session = None

    def withdraw(self) -> None:
        """Make the stage safe now: stop the controller call in flight (``abort()``, from any thread), withdraw,
        drive off, bias zero and, with a magnet, field zero. The running step then ends with
        ``drivers.errors.Aborted`` through its guard."""
        from assistant.procedures.guard import stop_now

        stop_now(self.controller)

    # ---- steps ------------------------------------------------------------------------------------------
    def calibrate(self, settings: CalibrationSettings, *, probe_record=None) -> CalibrationResult:
        result = calibrate(self.controller, settings, limits=self.limits, sink=self.sink, cancel=self.cancel)
        self.calibration = result
        self.drive = result.drive
        self.spring_constant_n_per_m = result.k_n_per_m
        self.quality_factor = result.thermal.q
        self.temperature_k = result.thermal.temperature_k
        fit = result.thermal.fit
        arrays = {"fit_frequency_hz": fit.frequencies_hz, "fit_psd_v2_per_hz": fit.psd_v2_per_hz,
                  "fit_model_v2_per_hz": fit.model(fit.frequencies_hz)}
        record = calibration_scalars(result, settings.probe_name)
        scalars = dict(record)
        if fit.spectrum is not None:  # the whole averaged spectrum, so it can be refitted offline
            arrays["spectrum_frequency_hz"] = fit.spectrum.frequencies_hz
            arrays["spectrum_psd_v2_per_hz"] = fit.spectrum.psd_v2_per_hz
            scalars.update(spectrum_rate_hz=fit.spectrum.rate_hz, spectrum_segments=fit.spectrum.n_segments,
                           spectrum_segment_length=fit.spectrum.segment_length,
                           spectrum_variance_inflation=fit.spectrum.variance_inflation)
        self.session.write_calibration(scalars, arrays)
        if result.sweep_data is not None:
            sd = result.sweep_data
            self.session.write_resonance({k: v for k, v in result.sweep.to_dict().items() if v is not None},
                                         {"frequency_hz": sd.frequency_hz, "amplitude_v": sd.amplitude_v,
                                          "phase_deg": sd.phase_deg})
        if probe_record is not None and settings.probe_name:
            self.probe_warnings = probe_record.add(settings.probe_name, record)
            for w in self.probe_warnings:
                self.sink(Notice("warning", f"probe record: {w}"))
        return result

    @classmethod
    def resume(cls, controller, plan: ResumePlan, **options) -> "Workflow":
        """A workflow that continues the session of ``plan`` (:meth:`ResumePlan.read`): its file reopened for
        writing, the stored drive, k, Q and temperature instead of a new calibration. Go on with
        :meth:`approach` and ``series(plan.series, resume=True)``, or ``field_series(plan.series, resume=True)``
        when ``plan.is_field_series``. ``options`` as for the constructor."""
        from assistant.storage import SessionFile

        wf = cls(controller, plan.path, **options)
        wf._session = SessionFile.open(plan.path, "a", fsync=wf.fsync)
        wf.drive = plan.drive  # None at the "start" stage: calibrate first
        wf.spring_constant_n_per_m = plan.spring_constant_n_per_m
        wf.quality_factor = plan.quality_factor
        wf.temperature_k = plan.temperature_k
        return wf

    def approach(self) -> ApproachResult:
        if self.drive is None:
            raise WorkflowError("calibrate first: the approach needs the drive frequency, amplitude and setpoint")
        d = self.drive
        res = approach(self.controller, ApproachSettings(d.frequency_hz, d.amplitude_v, d.setpoint_v,
                                                         d.free_amplitude_v),
                       limits=self.limits, sink=self.sink, cancel=self.cancel)
        self.approach_result = res
        self.session.write_approach(
            {"engaged": int(res.engaged), "z_m": res.z_m, "coarse_position_m": res.coarse_position_m,
             "coarse_travel_m": res.coarse_travel_m, "cycles": res.cycles},
            {"trace_coarse_m": res.trace_coarse_m, "trace_z_m": res.trace_z_m,
             "trace_amplitude_v": res.trace_amplitude_v})
        return res

    def series(self, settings: SeriesSettings, *, resume: bool = False) -> SeriesResult:
        if self.approach_result is None or not self.approach_result.engaged:
            raise WorkflowError("approach first: the series needs an engaged tip")
        if self.drive is not None and settings.phase_reference_deg == 0.0:
            settings = dataclasses.replace(settings, phase_reference_deg=self.drive.phase_reference_deg)
        settings.validate(self.limits, z_range_m=self.controller.limits.z_range_m,
                          scan_size_max_m=self.controller.limits.scan_size_max_m)
        self.series_settings = settings
        if resume:
            from assistant.storage import resume_writer

            writer = resume_writer(self.session, settings.name, before_write=self.before_write)
        else:
            writer = self.session.create_series(
                settings.name, heights_m=settings.heights_m, biases_v=settings.biases_v, lines=settings.lines,
                pixels=settings.pixels, scan_size_m=settings.scan_size_m, line_rate_hz=settings.line_rate_hz,
                order=settings.order, repeat_first=settings.repeat_first, settings_json=self._stored_settings(settings),
                before_write=self.before_write)
        start = writer.completed_lines
        res = run_series(self.controller, settings, writer, limits=self.limits, sink=self.sink, cancel=self.cancel,
                         start_line=start)
        self.series_result = res
        return res

    def _stored_settings(self, settings: SeriesSettings | FieldSeriesSettings) -> str:
        """The series settings and the calibration they were taken with, as the session file keeps them."""
        drive = {"drive": dataclasses.asdict(self.drive)} if self.drive is not None else {}
        return json.dumps({**settings.to_dict(), **drive, "spring_constant_n_per_m": self.spring_constant_n_per_m,
                           "quality_factor": self.quality_factor, "temperature_k": self.temperature_k})

    def analyse(self, name: str | None = None):
        """Decompose the series (from the session file, so a resumed or reopened session works the same)."""
        from assistant.procedures.analyse import analyse_session_series

        name = name or (self.series_settings.name if self.series_settings else None)
        with safety_guard(self.controller, sink=self.sink):
            self.controller.make_safe()  # the scan is over: nothing needs the tip near the surface now
        self.analysis = analyse_session_series(self.session, name, sink=self.sink)
        return self.analysis

    def field_map(self, tip, *, record=None, name: str | None = None):
        """Quantitative MFM: map the stray field of the series at its recommended height with the TTF of ``tip``
        (a tip file, e.g. the probe's newest from the probe record) and store it as ``field_map/<series>``."""
        from assistant.procedures.quantitative import field_map_for_session

        name = name or (self.series_settings.name if self.series_settings else None)
        self.field_map_result = field_map_for_session(self.session, tip, series=name, record=record)
        for text in self.field_map_result.summary["warnings"]:
            self.sink(Notice("warning", f"field map: {text}"))
        return self.field_map_result

    def field_series(self, settings: FieldSeriesSettings, *, resume: bool = False) -> FieldSeriesResult:
        """Image every field step of ``settings`` at one lift height; the field ends at zero (and goes to zero
        through the safety guard on any stop). A resume retraces the fields' turning points first."""
        if self.approach_result is None or not self.approach_result.engaged:
            raise WorkflowError("approach first: the field series needs an engaged tip")
        if self.drive is not None and settings.phase_reference_deg == 0.0:
            settings = dataclasses.replace(settings, phase_reference_deg=self.drive.phase_reference_deg)
        check_controller(self.controller, settings, self.limits)  # before the file gets a group for it
        self.field_settings = settings
        if resume:
            from assistant.storage import resume_field_writer

            writer = resume_field_writer(self.session, settings.name, before_write=self.before_write)
        else:
            writer = self.session.create_field_series(
                settings.name, fields_a_per_m=settings.fields_a_per_m, lines=settings.lines,
                pixels=settings.pixels, scan_size_m=settings.scan_size_m, line_rate_hz=settings.line_rate_hz,
                lift_height_m=settings.lift_height_m, repeat_first=settings.repeat_first, order=settings.order,
                settings_json=self._stored_settings(settings), field_axis=settings.field_axis,
                before_write=self.before_write)
        self.field_result = run_field_series(self.controller, settings, writer, limits=self.limits, sink=self.sink,
                                             cancel=self.cancel)
        return self.field_result

    def analyse_loop(self, name: str | None = None):
        """Switching fields and the loop of the field series (from the session file, stored back into it)."""
        from assistant.procedures.analyse_loop import analyse_stored

        name = name or (self.field_settings.name if self.field_settings else None)
        with safety_guard(self.controller, sink=self.sink):
            self.controller.make_safe()  # the images are taken: nothing needs the tip, the drive or the field now
        self.loop_analysis = analyse_stored(self.session, name, sink=self.sink)
        return self.loop_analysis


def calibration_scalars(result: CalibrationResult, probe_name: str | None, *, now: datetime | None = None) -> dict:
    """The headline numbers of a calibration, their sources and the Sader inputs and outputs, as plain scalars:
    what the session file and the probe record keep."""
    d = {k: v for k, v in result.summary().items() if v is not None and not isinstance(v, bool)}
    if result.sader is not None:
        d.update({f"sader_{k}": v for k, v in result.sader.to_dict().items() if v is not None})
    d = {k: (float(v) if hasattr(v, "dtype") else v) for k, v in d.items()}
    d["probe_name"] = probe_name or "unnamed"
    d["calibrated_utc"] = (now or datetime.now(timezone.utc)).isoformat(timespec="seconds")
    return d
