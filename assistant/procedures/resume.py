"""Resume an interrupted run from its session file, whatever moment it was stopped at.

What the file says decides what is left to do (:func:`read_resume_plan`, giving a
:class:`~assistant.procedures.workflow.ResumePlan` for :meth:`~assistant.procedures.workflow.Workflow.resume`):

* ``"start"``: stopped before the series began (during the calibration or the approach): the run plan stored
  at the start says what was asked; calibrate, approach and scan from the first line.
* ``"scan"``: stopped during the series (a lift series, or a field series: the same for every field step, whose
  fields' turning points are retraced first): re-establish the drive the series ran with, approach, continue at
  the first line not counted in ``completed_lines``.
* ``"analyse"``: every line is written but the analysis or the report was not: no motion at all.
* a session marked complete has nothing left (:class:`ResumeError`).

Nothing is assumed about where the instrument was left. The controller reports where the coarse motor is now
(a process that died may have left it anywhere, and a new simulated stage starts from its own origin); the
approach starts from there. Before any coarse motion, :func:`reestablish_drive` sets the stored drive on the
withdrawn lever and checks that it oscillates as it did when the series began (same free amplitude within
15 %, common practice, no source); a different lever, a shifted resonance or a different simulated scenario is
refused with both numbers instead of being driven towards the surface with a setpoint it cannot reach.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

from assistant.errors import AssistantError
from assistant.procedures.calibrate import CalibrationSettings, DriveSettings
from assistant.procedures.events import CancelToken, Notice, Sink, null_sink
from assistant.procedures.field_series import FieldSeriesSettings
from assistant.procedures.guard import SafetyLimits, safety_guard
from assistant.procedures.series import SeriesSettings
from assistant.procedures.workflow import CALIBRATION_KEYS, ResumePlan

AMPLITUDE_TOLERANCE = 0.15  # free amplitude at the stored drive, relative (common practice, no source)
PHASE_TOLERANCE_DEG = 2.0   # free phase at the drive frequency; beyond it the resumed lines carry an offset


class ResumeError(AssistantError, ValueError):
    """The file has nothing to resume, or lacks what a resume needs; one line naming it."""


class InstrumentMismatch(AssistantError, ValueError):
    """The instrument does not reproduce the drive stored in the session file."""


def run_plan_json(settings: SeriesSettings | FieldSeriesSettings, calibration: CalibrationSettings, *,
                  probe_record: bool) -> str:
    """The run plan kept in the session file before anything moves (``SessionFile.create(run_plan_json=...)``); a field
    series is kept under ``field_series``, a lift series under ``series``."""
    key = "field_series" if isinstance(settings, FieldSeriesSettings) else "series"
    return json.dumps({key: settings.to_dict(), "calibration": dataclasses.asdict(calibration),
                       "probe_record": bool(probe_record)})


def _settings(stored: dict, kind: str) -> SeriesSettings | FieldSeriesSettings:
    cls = FieldSeriesSettings if kind == "field_series" else SeriesSettings
    return cls.from_dict({k: v for k, v in stored.items() if k not in CALIBRATION_KEYS})


def _complete_error(path: Path, names: list[str], field_names: list[str]):
    from assistant.storage import FinishedSeriesError

    what = ([f"series {names[-1]!r}"] if names else []) + ([f"field series {field_names[-1]!r}"] if field_names
                                                           else [])
    where = f"{' and '.join(what)} in {path}" if what else str(path)
    return FinishedSeriesError(f"{where} {'are' if len(what) > 1 else 'is'} already complete; nothing to resume "
                               "(mfma report writes its report again)")


def read_resume_plan(path: str | Path) -> ResumePlan:
    """Read what is left to do from an interrupted session file (opened read-only and closed again).

    An unfinished lift series is continued before an unfinished field series (``storage.resume_point``); when
    every series has all its lines, the last lift series (else the last field series) is analysed."""
    from assistant.storage import FinishedSeriesError, SessionFile, SessionFileError, resume_point
    from assistant.storage.resume import FIELD_SERIES, LIFT_SERIES

    path = Path(path)
    if not path.is_file():
        raise ResumeError(f"resume file {path} does not exist")
    with SessionFile.open(path, "r") as sf:  # raises a clear error for files that are not session files
        info = sf.info()
        names, field_names = sf.series_names(), sf.field_series_names()
        if info.complete:
            raise _complete_error(path, names, field_names)
        plan = json.loads(info.run_plan_json) if info.run_plan_json else None
        calibration = CalibrationSettings(**plan["calibration"]) if plan and "calibration" in plan else None
        common = dict(path=path, scenario_text=info.scenario_text, probe_record=bool(plan and plan.get("probe_record")),
                      calibration=calibration)
        if not names and not field_names:
            if plan is None:
                raise SessionFileError(f"{path} has no series to resume and no run plan to start one from")
            kind = "field_series" if "field_series" in plan else "series"
            return ResumePlan(stage="start", series=_settings(plan[kind], kind), completed_lines=0, drive=None,
                              spring_constant_n_per_m=None, quality_factor=None, temperature_k=295.15, **common)
        try:
            point = resume_point(sf)
            name, kind, done, stored, stage = (point.series_name, point.kind, point.completed_lines, point.settings,
                                               "scan")
        except FinishedSeriesError:  # every line is written: what is left is the analysis and the report
            kind = LIFT_SERIES if names else FIELD_SERIES
            name = names[-1] if names else field_names[-1]
            data = sf.read_series(name) if kind == LIFT_SERIES else sf.read_field_series(name)
            done, stored, stage = data.completed_lines, json.loads(data.settings_json), "analyse"
    drive = stored.get("drive")
    if stage == "scan" and drive is None:
        what = "field series" if kind == FIELD_SERIES else "series"
        raise ResumeError(f"{what} {name!r} in {path} stores no drive settings, so its lines cannot be "
                          "continued with the same drive; start a new run")
    return ResumePlan(stage=stage, series=_settings(stored, kind),
                      drive=None if drive is None else DriveSettings(**{k: None if v is None else float(v)
                                                                        for k, v in drive.items()}),
                      spring_constant_n_per_m=stored.get("spring_constant_n_per_m"),
                      quality_factor=stored.get("quality_factor"),
                      temperature_k=float(stored.get("temperature_k") or 295.15), completed_lines=done, **common)


def reestablish_drive(controller, drive: DriveSettings, *, limits: SafetyLimits | None = None,
                      sink: Sink = null_sink, cancel: CancelToken | None = None) -> dict:
    """Withdraw, set the stored drive and check the free oscillation against the stored one, before any coarse
    motion. Returns what was measured; raises :class:`InstrumentMismatch` when the lever does not respond as
    stored. Runs inside the safety guard (the stage is left safe on any failure)."""
    limits = limits or SafetyLimits()
    cancel = cancel or CancelToken()
    with safety_guard(controller, sink=sink):
        controller.make_safe()  # whatever state the stopped run left: withdrawn, drive off, bias 0 V
        status = controller.status()
        cancel.raise_if_set()
        limits.check_drive(drive.amplitude_v)
        controller.set_drive(drive.frequency_hz, drive.amplitude_v)
        readings = [controller.read(["amplitude_v", "phase_deg", "sum_v"]) for _ in range(4)]
        limits.check_sum(min(r["sum_v"] for r in readings))
        amp = sum(float(r["amplitude_v"]) for r in readings) / len(readings)
        phase = sum(float(r["phase_deg"]) for r in readings) / len(readings)
        ratio = amp / drive.free_amplitude_v
        if not abs(ratio - 1.0) <= AMPLITUDE_TOLERANCE:
            controller.drive_off()
            raise InstrumentMismatch(
                f"at the stored drive ({drive.frequency_hz:.1f} Hz, {drive.amplitude_v * 1e3:.1f} mV) the free "
                f"amplitude is {amp * 1e3:.1f} mV, but the session file recorded {drive.free_amplitude_v * 1e3:.1f} "
                "mV: not the lever, resonance or scenario the series ran with; resume on that instrument or start "
                "a new run")
        shift = phase - drive.phase_reference_deg
        if abs(shift) > PHASE_TOLERANCE_DEG:
            sink(Notice("warning", f"the free phase at the drive frequency moved by {shift:+.2f} deg since the "
                                   "series began (resonance drift?): the resumed lines carry that offset"))
        sink(Notice("info", f"drive re-established: free amplitude {amp * 1e3:.1f} mV "
                            f"({(ratio - 1) * 100:+.1f} % of the stored), coarse motor at "
                            f"{status.coarse_position_m * 1e6:.2f} µm as the controller reports it"))
    return {"free_amplitude_v": amp, "free_phase_deg": phase, "amplitude_ratio": ratio,
            "coarse_position_m": status.coarse_position_m}
