"""``mfma run``: the whole session headless — calibrate, approach, series, analysis, report (a field series with
``--fields-ka-per-m``: :mod:`assistant.cli.cmd_run_fields`)."""

from __future__ import annotations

import os
from pathlib import Path

from assistant.cli._common import EXIT_OK, EXIT_RUNTIME, UsageError, controller_for_command, emit_json, emit_text
from assistant.outputs import new_session_path, report_dir_for


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

    if args.invols_std and not args.invols:
        raise UsageError("--invols-std is the uncertainty of --invols: give --invols too")
    return CalibrationSettings(
        probe_name=args.probe, length_m=args.length_um * 1e-6 if args.length_um else None,
        width_m=args.width_um * 1e-6 if args.width_um else None,
        temperature_k=args.temperature_k, pressure_pa=args.pressure_pa,
        thermal_seconds=args.thermal_seconds, free_amplitude_m=args.free_amplitude_nm * 1e-9,
        setpoint_ratio=args.setpoint_ratio, invols_m_per_v=args.invols * 1e-9 if args.invols else None,
        invols_std_m_per_v=args.invols_std * 1e-9 if args.invols_std else None, contact_invols=args.contact_invols)


def _series_settings(args):
    from assistant.procedures.series import DEFAULT_HEIGHTS_M, SeriesSettings

    heights = tuple(h * 1e-9 for h in args.heights) if args.heights else DEFAULT_HEIGHTS_M
    biases = tuple(args.biases)
    grid = biases if len(biases) >= 2 else None  # two only with one or two heights (checked with the plan)
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


def resume_controller_options(args, plan) -> dict:
    """Options for the controller a resume opens: on the simulated stage its pace, the series' line rate and,
    unless ``--scenario`` names another, the scenario the file was recorded on."""
    from drivers.registry import scheme_of

    if scheme_of(args.controller) != "sim":
        return {}
    extra = {"pace": args.pace, "line_rate": plan.series.line_rate_hz}
    if plan.scenario_text:
        from simulated_stage.scenario import Scenario

        stored = Scenario.from_text(plan.scenario_text, name="stored")
        if args.scenario:
            _check_same_sample(args.scenario, stored, plan.path)
        else:
            extra["scenario"] = stored
    return extra


def _check_same_sample(given: str, stored, path: Path) -> None:
    """A ``--scenario`` given to a resume must have the sample and tip the session was recorded with: the drive
    check (``reestablish_drive``) sees another lever, but lines of another sample would be stitched in unseen."""
    from assistant.procedures.resume import ResumeError
    from simulated_stage.errors import ScenarioError
    from simulated_stage.scenario import load_scenario

    try:
        scenario = load_scenario(given)
    except ScenarioError:
        return  # opening the controller reports it, as for a run
    differ = [what for what in ("sample", "tip") if getattr(scenario, what) != getattr(stored, what)]
    if differ:
        what = " and ".join(differ) + (" differ from those" if len(differ) > 1 else " differs from the one")
        raise ResumeError(f"--scenario {given}: its {what} {path.name} was recorded on; resume without --scenario "
                          "(the stored scenario is used) or start a new run")


_FIELD_MAP_NEEDS_LIFT_SERIES = "--field-map maps the stray field of a lift series; a field series has none to map"


def _field_map_tip(args):
    """With ``--field-map``: the probe's newest stored TTF, checked before anything moves (exit 2 if none)."""
    if not getattr(args, "field_map", False):
        return None
    if not args.probe:
        raise UsageError("--field-map needs --probe NAME (the probe whose stored TTF maps the field)")
    from assistant.procedures.quantitative import resolve_tip
    from assistant.procedures.quantitative_inputs import QuantitativeInputError
    from assistant.storage.probe_record import ProbeRecord

    try:
        return resolve_tip(tip_path=None, probe=args.probe, record=ProbeRecord())
    except QuantitativeInputError as exc:
        raise UsageError(str(exc)) from None


def _field_map_step(wf, tip) -> str | None:
    """The optional field map after the analysis. A TTF that does not fit this session (e.g. the calibration found
    the probe changed) leaves the session and report complete: the text returned is reported by ``_finish``, once,
    at the end, and the command exits 1."""
    if tip is None:
        return None
    from assistant.procedures.quantitative_inputs import QuantitativeInputError
    from assistant.storage.probe_record import ProbeRecord

    try:
        wf.field_map(tip, record=ProbeRecord())
    except QuantitativeInputError as exc:
        return f"field map not made: {exc}"
    return None


def _complete(args, wf, path: Path, tip, progress):
    """After the analysis: the optional field map, the complete flag on disk, then the report, which reads the
    file. Returns ``(report, field map error or None)``."""
    from assistant.report.summary import build_report

    field_map_error = _field_map_step(wf, tip)
    wf.session.mark_complete()
    wf.session.flush()
    report = build_report(path, report_dir_for(path), sink=progress, per_height_scale=args.per_height_scale)
    return report, field_map_error


def run(args) -> int:
    from assistant.cli.interrupts import remember_interrupts
    from assistant.cli.progress import StageProgress
    from assistant.procedures.guard import load_limits

    with remember_interrupts() as latch:  # a Ctrl-C while the libraries load is honoured before any motion
        limits = load_limits(args.limits)
        if args.field_map and args.fields_ka_per_m is not None and not args.resume:
            raise UsageError(_FIELD_MAP_NEEDS_LIFT_SERIES)
        tip = _field_map_tip(args)
        # the report's libraries (matplotlib and the analysis, about 0.5 s) load here, before any motion: a broken
        # install fails with the stage untouched, and no path spends that time between the analysis and the report
        import assistant.report.summary  # noqa: F401
        from assistant.report.figure_jobs import start_early

        start_early()  # the figure workers load matplotlib on the second core while the stage works
        with StageProgress() as progress:
            if args.resume:
                return _resume(args, limits, progress, latch, tip)
            if args.fields_ka_per_m is not None:
                from assistant.cli.cmd_run_fields import run_fields

                return run_fields(args, limits, progress, latch)
            return _run(args, limits, progress, latch, tip)


def _run(args, limits, progress, latch, tip=None) -> int:
    from assistant.procedures.resume import run_plan_json
    from assistant.procedures.workflow import Workflow
    from drivers.registry import redact, scheme_of

    series_settings = _series_settings(args)
    _plan(series_settings, limits)
    cal_settings = calibration_settings(args)
    cal_settings.validate()
    out = _writable_dir(args.out)
    from assistant.procedures.preflight import check_disk_space, series_bytes

    check_disk_space(series_bytes(series_settings), out)  # a full disk halfway would cut the series short
    session_path = new_session_path(out)
    extra = {"pace": args.pace, "line_rate": args.line_rate} if scheme_of(args.controller) == "sim" else {}
    # Ctrl-C at any moment with the controller open, even between two steps, stops the stage through abort()
    with controller_for_command(args, **extra) as ctl:
        _plan(series_settings, limits, controller=ctl, sink=progress)  # before the first motion
        # the plan is in the session file from its creation, so a run stopped at any moment leaves either no file
        # or one that can be resumed
        wf = Workflow(ctl, session_path, controller_url=redact(args.controller), scenario_text=_scenario_text(ctl),
                      limits=limits, sink=progress, fsync=args.fsync, before_write=_writer_hook(ctl),
                      run_plan_json=run_plan_json(series_settings, cal_settings, probe_record=bool(args.probe)))
        try:
            from assistant.storage.probe_record import ProbeRecord

            wf.session.flush()  # the file is created here, before anything moves
            latch.check()
            wf.calibrate(cal_settings, probe_record=ProbeRecord() if args.probe else None)
            latch.check()
            wf.approach()
            latch.check()
            wf.series(series_settings)
            latch.check()
            with progress.stage("analysis", "decomposing the series"):
                analysis = wf.analyse()
            report, field_map_error = _complete(args, wf, session_path, tip, progress)
        finally:
            wf.close()
    return _finish(args, session_path, report, wf, analysis, field_map_error)


def _resume(args, limits, progress, latch, tip=None) -> int:
    from assistant.procedures.events import Notice
    from assistant.procedures.resume import read_resume_plan, reestablish_drive
    from assistant.procedures.workflow import Workflow

    plan = read_resume_plan(args.resume)  # what is left: start, scan or analyse (see procedures/resume.py)
    from assistant.cli.parser import command_line
    from assistant.cli.resume_options import check_unchanged

    check_unchanged(args, plan, command_line())  # an option that would change the stored plan is refused
    if plan.is_field_series:
        from assistant.cli.cmd_run_fields import resume_fields

        if tip is not None:
            raise UsageError(_FIELD_MAP_NEEDS_LIFT_SERIES)
        return resume_fields(args, plan, limits, progress, latch)
    path, settings = plan.path, plan.series
    if plan.stage == "analyse":  # every line is written: analyse and report, no instrument needed
        return _finish_stored(args, plan, progress, tip)
    _plan(settings, limits)
    extra = resume_controller_options(args, plan)
    with controller_for_command(args, **extra) as ctl:
        _plan(settings, limits, controller=ctl)  # before the first motion
        wf = Workflow.resume(ctl, plan, limits=limits, sink=progress, fsync=args.fsync,
                             before_write=_writer_hook(ctl))
        try:
            latch.check()
            if plan.stage == "start":
                from assistant.storage.probe_record import ProbeRecord

                progress(Notice("info", f"resuming {path.name}: stopped before its series began; starting it"))
                wf.calibrate(plan.calibration, probe_record=ProbeRecord() if plan.probe_record else None)
            else:
                progress(Notice("info", f"resuming {settings.name} at {plan.where}"))
                reestablish_drive(ctl, plan.drive, limits=limits, sink=progress, cancel=wf.cancel)
            latch.check()
            wf.approach()
            latch.check()
            wf.series(settings, resume=plan.stage == "scan")
            latch.check()
            with progress.stage("analysis", "decomposing the series"):
                analysis = wf.analyse()
            report, field_map_error = _complete(args, wf, path, tip, progress)
        finally:
            wf.close()
    return _finish(args, path, report, wf, analysis, field_map_error)


def _finish_stored(args, plan, progress, tip=None) -> int:
    """The series was complete when the run stopped: the analysis, the report and the complete flag."""
    from assistant.procedures.analyse import analyse_session_series
    from assistant.procedures.events import Notice
    from assistant.procedures.series import SeriesResult
    from assistant.procedures.workflow import Workflow

    path, s = plan.path, plan.series
    progress(Notice("info", f"resuming {path.name}: every line is written; analyzing and reporting"))
    wf = Workflow.resume(None, plan, sink=progress, fsync=args.fsync)
    try:
        wf.series_settings = s
        wf.series_result = SeriesResult(s.name, s.heights_m, plan.completed_lines, s.lines, 0.0)
        with progress.stage("analysis", "decomposing the series"):
            analysis = wf.analysis = analyse_session_series(wf.session, s.name, sink=progress)
        report, field_map_error = _complete(args, wf, path, tip, progress)
    finally:
        wf.close()
    return _finish(args, path, report, wf, analysis, field_map_error)


def calibration_summary(wf) -> dict:
    """The cantilever numbers the session used: its own calibration, else the values it was given (no InvOLS)."""
    cal = wf.calibration
    if cal is not None:
        return {"k_n_per_m": cal.k_n_per_m, "k_std_n_per_m": cal.k_std_n_per_m, "f0_hz": cal.thermal.f0_hz,
                "q": cal.thermal.q, "invols_nm_per_v": cal.invols_m_per_v * 1e9}
    return {"k_n_per_m": wf.spring_constant_n_per_m, "k_std_n_per_m": None,
            "f0_hz": wf.drive.frequency_hz if wf.drive is not None else None, "q": wf.quality_factor,
            "invols_nm_per_v": None}


def calibration_text(calib: dict) -> str:
    """:func:`calibration_summary` as one line of the closing summary."""
    from assistant.formatting import number, quantity

    text = (f"k {quantity(calib['k_n_per_m'], 'N/m', calib['k_std_n_per_m'])}, f0 {quantity(calib['f0_hz'], 'Hz')}, "
            f"Q {number(calib['q'], digits=3)}")
    if calib["invols_nm_per_v"] is not None:
        text += f", optical-lever sensitivity {quantity(calib['invols_nm_per_v'], 'nm/V')}"
    return text


def _finish(args, session_path: Path, report, wf, analysis, field_map_error: str | None = None) -> int:
    calib = calibration_summary(wf)
    s = wf.series_settings
    summary = {
        "session_file": str(session_path), "report_dir": str(report.out_dir),
        "calibration": calib,
        "series": {"heights_nm": [round(h * 1e9, 6) for h in s.heights_m],  # no 14.999999999999998
                   "completed_lines": wf.series_result.completed_lines},
        "analysis": analysis.to_dict() if analysis is not None else None,
    }
    if wf.field_map_result is not None or field_map_error:
        summary["field_map"] = wf.field_map_result.summary if wf.field_map_result is not None else None
        summary["field_map_error"] = field_map_error
    if args.json:
        emit_json(summary)
        return _field_map_verdict(field_map_error)
    from assistant.formatting import number, number_list, quantity, span
    from assistant.report.results import render_block, results_block

    a = summary["analysis"] or {}
    heights = number_list(summary["series"]["heights_nm"], "nm")
    pairs = results_block(a) if a else [("Analysis", "none")]
    fmap = summary.get("field_map")
    if fmap:
        pairs.append(("Field map", f"μ0 Hz rms {number(fmap['mu0_hz_rms_mt'], digits=3)} mT at "
                                   f"{quantity(fmap['height_nm'], 'nm', digits=3)} (periods "
                                   f"{span(*fmap['band_nm'], 'nm')}), stored in the session file as "
                                   f"field_map/{wf.field_map_result.image.series}"))
    emit_text(render_block(pairs + [
        ("Calibration", calibration_text(calib)),
        ("Series", f"{wf.series_result.completed_lines} lines at {len(s.heights_m)} lift "
                   f"height{'s' if len(s.heights_m) != 1 else ''} ({heights})"
         + (f" × {len(s.biases_v)} biases" if s.biases_v else "")),
        ("Session file", str(session_path)), ("Report", str(report.out_dir))], markdown=False))
    return _field_map_verdict(field_map_error)


def _field_map_verdict(error: str | None) -> int:
    """A refused field map is the one failure that leaves the session and its report complete: said once, last."""
    if not error:
        return EXIT_OK
    import sys

    sys.stderr.write(f"mfma: error: {error}\n")
    return EXIT_RUNTIME
