"""``mfma run --fields-ka-per-m LIST|START:STOP:STEP``: calibrate, approach once, image every field step at one
lift height, analyse the loop, write the report. ``mfma run --resume FILE`` on a session whose field series was
interrupted continues it at whatever moment it stopped (``cmd_run`` reads the
:class:`~assistant.procedures.workflow.ResumePlan` and hands a field series over to :func:`resume_fields`)."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, controller_for_command, emit_json, emit_text

DEFAULT_LIFT_NM = 50.0
_RUN_DEFAULT_BIASES = [-0.5, 0.0, 0.5, 1.0]  # ``mfma run``'s bias grid for a lift series; a field series takes one bias


def field_settings(args):
    from assistant.procedures.field_series import FieldSeriesSettings, parse_fields_ka_per_m

    fields = parse_fields_ka_per_m(args.fields_ka_per_m)
    heights = args.heights or [DEFAULT_LIFT_NM]
    if len(heights) != 1:
        raise UsageError(f"--heights: a field series images at one lift height, got {len(heights)}")
    biases = list(args.biases)
    if biases == _RUN_DEFAULT_BIASES:
        bias = 0.0
    elif len(biases) == 1:
        bias = biases[0]
    else:
        raise UsageError(f"--biases: a field series images at one tip bias, got {len(biases)}")
    return FieldSeriesSettings(fields_a_per_m=tuple(f * 1e3 for f in fields), lift_height_m=heights[0] * 1e-9,
                               bias_v=bias, lines=args.lines, pixels=args.pixels, scan_size_m=args.size_um * 1e-6,
                               line_rate_hz=args.line_rate, repeat_first=not args.no_repeat)


def _check(latch) -> None:
    """A Ctrl-C remembered by ``mfma run``'s latch stops the run before the next step that moves the stage."""
    if latch is not None:
        latch.check()


def run_fields(args, limits, progress, latch=None) -> int:
    """A new session: calibrate, approach, the field series, its loop analysis, the report. The run plan is kept
    in the file first, so a run stopped at any moment can be resumed."""
    from assistant.cli.cmd_run import _scenario_text, _writable_dir, _writer_hook, calibration_settings
    from assistant.outputs import new_session_path, report_dir_for
    from assistant.procedures.field_series import check_controller
    from assistant.procedures.resume import run_plan_json
    from assistant.procedures.workflow import Workflow
    from assistant.report.summary import build_report
    from drivers.registry import redact, scheme_of

    out = _writable_dir(args.out)
    settings = field_settings(args)
    settings.validate(limits)
    cal_settings = calibration_settings(args)
    cal_settings.validate()
    from assistant.procedures.preflight import check_disk_space, field_series_bytes

    check_disk_space(field_series_bytes(settings), out)  # a full disk halfway would cut the series short
    session_path = new_session_path(out)
    extra = {"pace": args.pace, "line_rate": args.line_rate} if scheme_of(args.controller) == "sim" else {}
    # Ctrl-C at any moment with the controller open, even between two steps, stops the stage through abort()
    with controller_for_command(args, **extra) as ctl:
        check_controller(ctl, settings, limits)  # the magnet and its limits, before anything moves
        wf = Workflow(ctl, session_path, controller_url=redact(args.controller), scenario_text=_scenario_text(ctl),
                      limits=limits, sink=progress, fsync=args.fsync, before_write=_writer_hook(ctl),
                      run_plan_json=run_plan_json(settings, cal_settings, probe_record=bool(args.probe)))
        try:
            from assistant.storage.probe_record import ProbeRecord

            wf.session.flush()  # the file is created here with its run plan, before anything moves
            _check(latch)
            wf.calibrate(cal_settings, probe_record=ProbeRecord() if args.probe else None)
            _check(latch)
            wf.approach()
            _check(latch)
            wf.field_series(settings)
            _check(latch)
            analysis = _analysed(wf, progress, session_path)
            wf.session.mark_complete()
            wf.session.flush()
            report = build_report(session_path, report_dir_for(session_path), sink=progress)
        finally:
            wf.close()
    return _finish(args, session_path, report, wf, analysis)


def resume_fields(args, plan, limits, progress, latch=None) -> int:
    """Continue the interrupted field series of ``plan`` (a field series' ResumePlan) through the workflow's
    resume, at the stage the file says is left: ``start`` (calibrate first), ``scan`` (the stored drive
    re-established, a new approach, the turning points retraced, the remaining steps) or ``analyse`` (every line
    written: the loop analysis and the report, no instrument)."""
    from assistant.cli.cmd_run import _writer_hook, resume_controller_options
    from assistant.outputs import report_dir_for
    from assistant.procedures.events import Notice
    from assistant.procedures.field_series import check_controller
    from assistant.procedures.resume import reestablish_drive
    from assistant.procedures.workflow import Workflow
    from assistant.report.summary import build_report

    settings = plan.series
    if plan.stage == "analyse":
        return _finish_stored(args, plan, progress)
    settings.validate(limits)
    with controller_for_command(args, **resume_controller_options(args, plan)) as ctl:
        check_controller(ctl, settings, limits)
        wf = Workflow.resume(ctl, plan, limits=limits, sink=progress, fsync=args.fsync,
                             before_write=_writer_hook(ctl))
        try:
            _check(latch)
            if plan.stage == "start":
                from assistant.storage.probe_record import ProbeRecord

                progress(Notice("info", f"resuming {plan.path.name}: stopped before its field series began; "
                                        "starting it"))
                wf.calibrate(plan.calibration, probe_record=ProbeRecord() if plan.probe_record else None)
            else:
                progress(Notice("info", f"resuming {settings.name} at {plan.where}"))
                reestablish_drive(ctl, plan.drive, limits=limits, sink=progress, cancel=wf.cancel)
            _check(latch)
            wf.approach()
            _check(latch)
            wf.field_series(settings, resume=plan.stage == "scan")
            _check(latch)
            analysis = _analysed(wf, progress, plan.path)
            wf.session.mark_complete()
            wf.session.flush()
            report = build_report(plan.path, report_dir_for(plan.path), sink=progress)
        finally:
            wf.close()
    return _finish(args, plan.path, report, wf, analysis)


def _finish_stored(args, plan, progress) -> int:
    """Every line of the field series was written when the run stopped: the loop analysis, the report and the
    complete flag, without an instrument."""
    from assistant.analysis.field_series import LoopInputError
    from assistant.outputs import report_dir_for
    from assistant.procedures.analyse_loop import analyse_stored
    from assistant.procedures.events import Notice
    from assistant.procedures.field_series import FieldSeriesResult
    from assistant.procedures.workflow import Workflow
    from assistant.report.summary import build_report

    s = plan.series
    progress(Notice("info", f"resuming {plan.path.name}: every line is written; analyzing and reporting"))
    wf = Workflow.resume(None, plan, sink=progress, fsync=args.fsync)
    try:
        wf.field_settings = s
        wf.field_result = FieldSeriesResult(s.name, s.fields_a_per_m, [], plan.completed_lines, s.lines, 0.0)
        try:
            with progress.stage("analysis", "switching fields and the loop"):
                analysis = wf.loop_analysis = analyse_stored(wf.session, s.name, sink=progress)
        except LoopInputError as exc:
            raise UsageError(f"{exc}; the images are kept in {plan.path}") from None
        wf.session.mark_complete()
        wf.session.flush()
        report = build_report(plan.path, report_dir_for(plan.path), sink=progress)
    finally:
        wf.close()
    return _finish(args, plan.path, report, wf, analysis)


def _analysed(wf, progress, session_path: Path):
    """The loop analysis; stacks it cannot read (no elements in them) are bad input, the images kept."""
    from assistant.analysis.field_series import LoopInputError

    try:
        with progress.stage("analysis", "switching fields and the loop"):
            return wf.analyse_loop()
    except LoopInputError as exc:
        raise UsageError(f"{exc}; the images are kept in {session_path}") from None


def _finish(args, session_path: Path, report, wf, analysis) -> int:
    from assistant.cli.cmd_run import calibration_summary, calibration_text

    calib = calibration_summary(wf)
    s, res = wf.field_settings, wf.field_result
    loop = analysis.to_dict()
    summary = {
        "session_file": str(session_path), "report_dir": str(report.out_dir), "calibration": calib,
        "field_series": {"name": s.name, "fields_ka_per_m": [round(h / 1e3, 6) for h in s.fields_a_per_m],
                         "lift_height_nm": round(s.lift_height_m * 1e9, 6), "completed_steps": res.completed_steps,
                         "lines": s.lines},
        "loop": loop,
    }
    if args.json:
        emit_json(summary)
        return 0
    from assistant.cli.cmd_analyze_loop import spread_text, tagawa_text
    from assistant.formatting import quantity
    from assistant.report.results import render_block

    ka = lambda key: None if loop[key] is None else loop[key] * 1e3  # noqa: E731  (A/m for quantity)
    rev = loop["tip_reversals_ka_per_m"]
    pairs = [
        ("Coercive field", quantity(ka("coercive_field_ka_per_m"), "A/m", ka("coercive_field_std_ka_per_m"))),
        ("Switching-field spread", spread_text(loop)),
        *([("Interaction-corrected spread", tagawa_text(loop))] if loop["tagawa_sigma_ka_per_m"] is not None else []),
        ("Elements", f"{loop['dots']} ({analysis.elements.source})"),
        ("Tip reversals", ", ".join(quantity(h * 1e3, "A/m") for h in rev) if rev else "none"),
        ("Switched by the tip", ", ".join(map(str, loop["tip_switched_elements"])) or "none"),
        ("Calibration", calibration_text(calib)),
        ("Field series",
         f"{res.completed_steps} field steps × {s.lines} lines at {quantity(s.lift_height_m, 'm')} lift"),
        ("Session file", str(session_path)), ("Report", str(report.out_dir))]
    emit_text(render_block(pairs, markdown=False) + [f"note: {n}" for n in analysis.notes[1:]])
    return 0
