"""``mfma run``: the whole session headless — calibrate, approach, series, analysis, report."""

from __future__ import annotations

import os
from datetime import datetime, timezone
from pathlib import Path

from assistant.cli._common import StderrProgress, UsageError, emit_json, emit_text, open_controller_from_args


def _writable_dir(text: str) -> Path:
    out = Path(text)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UsageError(f"output folder {out} cannot be created: {exc.strerror}") from None
    if not out.is_dir() or not os.access(out, os.W_OK):
        raise UsageError(f"output folder {out} is not writable")
    return out


def calibration_settings(args):
    from assistant.procedures.calibrate import CalibrationSettings

    return CalibrationSettings(
        probe_name=args.probe, length_m=args.length_um * 1e-6 if args.length_um else None,
        width_m=args.width_um * 1e-6 if args.width_um else None,
        temperature_k=args.temperature_k, pressure_pa=args.pressure_pa,
        thermal_seconds=args.thermal_seconds, free_amplitude_m=args.free_amplitude_nm * 1e-9,
        setpoint_ratio=args.setpoint_ratio, invols_m_per_v=args.invols * 1e-9 if args.invols else None,
        contact_invols=args.contact_invols)


def _series_settings(args):
    from assistant.procedures.series import DEFAULT_HEIGHTS_M, SeriesSettings

    heights = tuple(h * 1e-9 for h in args.heights) if args.heights else DEFAULT_HEIGHTS_M
    biases = tuple(args.biases)
    if len(biases) == 2:
        raise UsageError("--biases: give one bias (no grid) or at least three biases for a bias grid, got two")
    grid = biases if len(biases) >= 3 else None
    return SeriesSettings(heights_m=heights, biases_v=grid, bias_v=biases[0] if grid is None else 0.0,
                          lines=args.lines, pixels=args.pixels,
                          scan_size_m=args.size_um * 1e-6, line_rate_hz=args.line_rate,
                          repeat_first=not args.no_repeat)


def _scenario_text(ctl) -> str | None:
    from drivers.simulated import SimulatedController

    return ctl.scenario_text if isinstance(ctl, SimulatedController) else None


def _writer_hook(ctl):
    """The simulated stage's full-disk fault, if its scenario injects one; nothing for real controllers."""
    from drivers.simulated import SimulatedController

    return ctl.writer_fault_hook() if isinstance(ctl, SimulatedController) else None


def _plan(settings, limits, *, controller=None, sink=None):
    """The checks before the stage moves (settings alone, then with the controller's limits and capabilities)."""
    from assistant.procedures.events import Notice
    from assistant.procedures.preflight import check_series_plan

    plan = check_series_plan(settings, limits=limits, controller=controller)
    if sink is not None:
        sink(Notice("info", "this series gives " + plan.sentence[0].lower() + plan.sentence[1:]))
    return plan


def run(args) -> int:
    from assistant.procedures.guard import load_limits
    from assistant.procedures.resume import run_plan_json
    from assistant.report.summary import build_report
    from assistant.procedures.workflow import Workflow
    from drivers.registry import redact, scheme_of

    limits = load_limits(args.limits)
    progress = StderrProgress(quiet=False)
    if args.resume:
        return _resume(args, limits, progress)
    series_settings = _series_settings(args)
    _plan(series_settings, limits)
    cal_settings = calibration_settings(args)
    cal_settings.validate()
    out = _writable_dir(args.out)
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    session_path = out / f"session-{stamp}.h5"
    extra = {"pace": args.pace, "line_rate": args.line_rate} if scheme_of(args.controller) == "sim" else {}
    with open_controller_from_args(args, **extra) as ctl:
        _plan(series_settings, limits, controller=ctl, sink=progress)  # before the first motion
        wf = Workflow(ctl, session_path, controller_url=redact(args.controller), scenario_text=_scenario_text(ctl),
                      limits=limits, sink=progress, fsync=args.fsync, before_write=_writer_hook(ctl))
        try:
            from assistant.storage.probe_record import ProbeRecord

            # the plan goes first, so a run stopped at any moment leaves a file that can be resumed
            wf.session.write_run_plan(run_plan_json(series_settings, cal_settings, probe_record=bool(args.probe)))
            wf.calibrate(cal_settings, probe_record=ProbeRecord() if args.probe else None)
            wf.approach()
            wf.series(series_settings)
            analysis = wf.analyse()
            wf.session.mark_complete()
            wf.session.flush()
            report = build_report(session_path, out / f"report-{stamp}",
                                  analyses={wf.series_settings.name: analysis})
        finally:
            wf.close()
    return _finish(args, session_path, report, wf, analysis)


def _resume(args, limits, progress) -> int:
    from assistant.procedures.resume import read_resume_point, reestablish_drive
    from assistant.report.summary import build_report
    from assistant.procedures.workflow import Workflow
    from assistant.storage.session_file import SessionFile
    from drivers.registry import redact, scheme_of

    point = read_resume_point(args.resume)
    path, settings = point.path, point.settings
    if point.stage == "analyse":  # every line is written: analyse and report, no instrument needed
        return _finish_stored(args, point, progress)
    _plan(settings, limits)
    extra = {}
    if scheme_of(args.controller) == "sim":
        extra = {"pace": args.pace, "line_rate": settings.line_rate_hz}
        if not args.scenario and point.scenario_text:  # the simulated stage the file was recorded on
            from simulated_stage.scenario import Scenario

            extra["scenario"] = Scenario.from_text(point.scenario_text, name="stored")
    with open_controller_from_args(args, **extra) as ctl:
        _plan(settings, limits, controller=ctl)  # before the first motion
        wf = Workflow(ctl, path, controller_url=redact(args.controller), limits=limits, sink=progress,
                      fsync=args.fsync, before_write=_writer_hook(ctl))
        wf._session = SessionFile.open(path, "a")
        try:
            if point.stage == "start":
                from assistant.storage.probe_record import ProbeRecord

                progress.notices.append(("info", f"resuming {path.name}: stopped before the series; starting it"))
                wf.calibrate(point.calibration, probe_record=ProbeRecord() if point.probe_record else None)
            else:
                wf.restore_drive(point.drive, spring_constant_n_per_m=point.spring_constant_n_per_m,
                                 quality_factor=point.quality_factor, temperature_k=point.temperature_k)
                progress.notices.append(("info", f"resuming {settings.name} at line {point.completed_lines}"))
                reestablish_drive(ctl, point.drive, limits=limits, sink=progress, cancel=wf.cancel)
            wf.approach()
            wf.series(settings, resume=point.stage == "scan")
            analysis = wf.analyse()
            wf.session.mark_complete()
            wf.session.flush()
            report = build_report(path, path.parent / f"report-{path.stem}",
                                  analyses={wf.series_settings.name: analysis})
        finally:
            wf.close()
    return _finish(args, path, report, wf, analysis)


def _finish_stored(args, point, progress) -> int:
    """The series was complete when the run stopped: the analysis, the report and the complete flag."""
    from assistant.procedures.analyse import analyse_session_series
    from assistant.procedures.series import SeriesResult
    from assistant.procedures.workflow import Workflow
    from assistant.report.summary import build_report
    from assistant.storage.session_file import SessionFile

    path, s = point.path, point.settings
    progress.notices.append(("info", f"resuming {path.name}: every line is written; analysing"))
    wf = Workflow(None, path, sink=progress, fsync=args.fsync)
    wf._session = SessionFile.open(path, "a")
    try:
        if point.drive is not None:
            wf.restore_drive(point.drive, spring_constant_n_per_m=point.spring_constant_n_per_m,
                             quality_factor=point.quality_factor, temperature_k=point.temperature_k)
        wf.series_settings = s
        wf.series_result = SeriesResult(s.name, s.heights_m, point.completed_lines, s.lines, 0.0)
        analysis = wf.analysis = analyse_session_series(wf.session, s.name, sink=progress)
        wf.session.mark_complete()
        wf.session.flush()
        report = build_report(path, path.parent / f"report-{path.stem}", analyses={s.name: analysis})
    finally:
        wf.close()
    return _finish(args, path, report, wf, analysis)


def _finish(args, session_path: Path, report, wf, analysis) -> int:
    cal = wf.calibration
    calib = ({"k_n_per_m": cal.k_n_per_m, "k_std_n_per_m": cal.k_std_n_per_m, "f0_hz": cal.thermal.f0_hz,
              "q": cal.thermal.q, "invols_nm_per_v": cal.invols_m_per_v * 1e9} if cal is not None else
             {"k_n_per_m": wf.spring_constant_n_per_m, "k_std_n_per_m": None,
              "f0_hz": wf.drive.frequency_hz if wf.drive is not None else None,
              "q": wf.quality_factor, "invols_nm_per_v": None})
    s = wf.series_settings
    summary = {
        "session_file": str(session_path), "report_dir": str(report.out_dir),
        "calibration": calib,
        "series": {"heights_nm": [round(h * 1e9, 6) for h in s.heights_m],  # no 14.999999999999998
                   "completed_lines": wf.series_result.completed_lines},
        "analysis": analysis.to_dict() if analysis is not None else None,
    }
    if args.json:
        emit_json(summary)
    else:
        a = summary["analysis"] or {}
        emit_text([
            f"session file: {session_path}",
            f"report:       {report.out_dir}",
            f"k = {calib['k_n_per_m']:.4g} N/m, f0 = {calib['f0_hz']:.1f} Hz, Q = {calib['q']:.1f}",
            f"series: {len(s.heights_m)} heights x {wf.series_result.completed_lines} lines",
            a["decomposition"] if a.get("kind") == "imaging" else  # one or two heights: says what it needs
            "recommended lift height: " + (f"{a['recommended_lift_nm']:.4g} nm" if a.get("recommended_lift_nm")
                                           else "none (see the report)"),
            "V_cpd: " + (f"{a['cpd_v']:.3f} ± {a.get('cpd_std_v') or 0:.1g} V" if a.get("cpd_v") is not None
                         else a.get("cpd_sentence") or "not measured (needs a bias grid, --biases)"),
        ])
    return 0
