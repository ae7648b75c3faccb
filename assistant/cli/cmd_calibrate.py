"""``mfma calibrate``: calibrate the mounted probe and keep the result (session file and probe record)."""

from __future__ import annotations

from assistant.cli._common import controller_for_command, emit_json, emit_text


def run(args) -> int:
    from assistant.cli.cmd_run import _scenario_text, _writable_dir, calibration_settings
    from assistant.cli.progress import StageProgress
    from assistant.outputs import new_session_path
    from assistant.procedures.workflow import Workflow
    from assistant.storage.probe_record import ProbeRecord
    from drivers.registry import redact

    settings = calibration_settings(args)
    settings.validate()
    path = new_session_path(_writable_dir(args.out))
    with StageProgress() as progress, controller_for_command(args) as ctl:
        wf = Workflow(ctl, path, controller_url=redact(args.controller),
                      scenario_text=_scenario_text(ctl), sink=progress)
        try:
            result = wf.calibrate(settings, probe_record=ProbeRecord() if args.probe else None)
            wf.session.mark_complete()
        finally:
            wf.close()
    summary = {**result.summary(), "session_file": str(path), "probe": args.probe,
               "sader": result.sader.to_dict() if result.sader is not None else None,
               "notices": result.notices, "probe_record_warnings": wf.probe_warnings}
    if args.json:
        emit_json(summary)
        return 0
    from assistant.formatting import number, quantity

    s = summary
    emit_text([f"resonance f0: {quantity(s['f0_hz'], 'Hz', s['f0_std_hz'])}, quality factor Q: "
               f"{number(s['q'], s['q_std'])} (thermal fit)",
               f"spring constant k: {quantity(s['k_n_per_m'], 'N/m', s['k_std_n_per_m'])} ({s['k_source']})",
               f"optical-lever sensitivity (InvOLS): {quantity(s['invols_nm_per_v'], 'nm/V', s['invols_std_nm_per_v'])}"
               f" ({s['invols_source']})",
               f"drive: {quantity(s['drive_frequency_hz'], 'Hz', digits=6)} at {quantity(s['drive_amplitude_v'], 'V')}"
               f" for a free amplitude of {quantity(s['free_amplitude_nm'], 'nm', digits=3)}; setpoint "
               f"{quantity(s['setpoint_v'], 'V')}",
               f"session file: {path}"]
              + ([f"probe record: calibration of {args.probe} stored"] if args.probe else []))
    return 0
