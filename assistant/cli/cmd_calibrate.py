"""``mfma calibrate``: calibrate the mounted probe and keep the result (session file and probe record)."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

from assistant.cli._common import StderrProgress, emit_json, emit_text, open_controller_from_args


def run(args) -> int:
    from assistant.cli.cmd_run import _scenario_text, _writable_dir, calibration_settings
    from assistant.procedures.workflow import Workflow
    from assistant.storage.probe_record import ProbeRecord
    from drivers.registry import redact

    settings = calibration_settings(args)
    settings.validate()
    if args.out:
        path = Path(args.out)
        _writable_dir(str(path.parent or "."))
    else:
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        path = _writable_dir("sessions") / f"calibration-{stamp}.h5"
    progress = StderrProgress(quiet=False)
    with open_controller_from_args(args) as ctl:
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
    else:
        s = summary
        lines = [f"f0 = {s['f0_hz']:.2f} ± {s['f0_std_hz']:.2f} Hz, Q = {s['q']:.1f} ± {s['q_std']:.1f} (thermal fit)",
                 f"k = {s['k_n_per_m']:.4g} ± {s['k_std_n_per_m']:.2g} N/m ({s['k_source']})",
                 f"InvOLS = {s['invols_nm_per_v']:.3f} ± {s['invols_std_nm_per_v']:.3f} nm/V ({s['invols_source']})",
                 f"drive {s['drive_frequency_hz']:.1f} Hz, {s['drive_amplitude_v'] * 1e3:.2f} mV -> free amplitude "
                 f"{s['free_amplitude_nm']:.1f} nm; setpoint {s['setpoint_v'] * 1e3:.1f} mV",
                 f"session file: {path}"]
        emit_text(lines)
    return 0
