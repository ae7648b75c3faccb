"""The field-map step of the terminal UI (quantitative MFM): the probe's newest stored TTF maps the stray field of
the series at its recommended height, live through the workflow (stored in the session file) or on a session file
opened for viewing (left unchanged; the map goes into its report folder)."""

from __future__ import annotations

from pathlib import Path


def start_field_map(app) -> None:
    """Check that the probe has a stored TTF, then run the step (live) or the offline worker (a session file)."""
    from assistant.procedures.quantitative import resolve_tip
    from assistant.procedures.quantitative_inputs import QuantitativeInputError

    record = app._probe_record
    if record is None:
        from assistant.storage.probe_record import ProbeRecord

        record = ProbeRecord()
    if not app.probe_name:
        app.say("error", "field map: name the probe (Probe view) whose stored TTF maps the field")
        return
    try:
        tip = resolve_tip(tip_path=None, probe=app.probe_name, record=record)
    except QuantitativeInputError as exc:
        app.say("error", f"field map: {exc}")
        return
    if app.workflow is None and app.open_path is not None:
        app._offline_worker("field map", app.open_path, tip, record)
        return
    wf = app.workflow
    app._run("field map", lambda: wf.field_map(tip, record=record))


def offline_field_map(path: Path, tip, record):
    """Map the field of the last series of a session file opened for viewing. The file stays as it is (opened
    read-only): the map goes into its report folder as ``field_map.npz`` and ``field_map.png``."""
    from assistant.outputs import report_dir_for
    from assistant.procedures.quantitative import field_map_for_session
    from assistant.report.field_figures import write_field_figures
    from assistant.storage.quantitative_files import write_field_file
    from assistant.storage.session_file import SessionFile

    with SessionFile.open(path, "r") as sf:
        result = field_map_for_session(sf, tip, record=record, store=False)
    out = report_dir_for(path)
    out.mkdir(parents=True, exist_ok=True)
    write_field_file(out / "field_map.npz", result.field_map, extra={"tip_file": str(tip.path), "probe": tip.probe,
                                                                      "source": result.image.source})
    write_field_figures(result.field_map, out)
    result.summary["field_file"] = str(out / "field_map.npz")
    return result
