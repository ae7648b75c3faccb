"""A stored session in the views, read-only: its own settings in the forms, its plots, its report.

Without a controller nothing can be calibrated, approached or scanned, so those buttons are hidden and the forms
show the file's values, locked. Analyze (computed again from the file, nothing written into it) and Report stay.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from textual.widgets import Button, Checkbox, Input

from assistant.formatting import number, number_list, quantity

_LIVE_ONLY = ("#calibrate", "#accept", "#approach-start", "#approach-stop", "#series-check", "#series-start")


def _set(view, input_id: str, value) -> None:
    field = view.query_one(f"#{input_id}", Input)
    field.value = "" if value is None else str(value)
    if value is None:
        field.placeholder = "not stored"


def show_stored(app, shown, path: Path) -> None:
    """Fill every view from ``shown`` (a :class:`~assistant.tui.session_view.StoredSession`) and lock the forms."""
    for selector in _LIVE_ONLY:
        for button in app.query(selector).results(Button):
            button.display = False
    for field in app.query(Input):
        field.disabled = True
    for box in app.query(Checkbox):
        box.disabled = True
    if shown.probe_name:
        app.probe_name = shown.probe_name
    probe = app.view("probe")
    if shown.calibration is not None:
        cal = shown.calibration
        _set(probe, "probe-name", shown.probe_name)
        _set(probe, "probe-length", None)
        _set(probe, "probe-width", None)
        _set(probe, "probe-temperature", number(cal.get("temperature_k")) if cal.get("temperature_k") else None)
        _set(probe, "probe-seconds", None)
        probe.show_summary(cal, live=False)
        arrays = shown.calibration_arrays
        if "fit_frequency_hz" in arrays and "fit_psd_v2_per_hz" in arrays:
            probe.spectrum = (np.asarray(arrays["fit_frequency_hz"]), np.asarray(arrays["fit_psd_v2_per_hz"]))
            if "fit_model_v2_per_hz" in arrays:
                probe.fit = {"frequency_hz": probe.spectrum[0], "model": np.asarray(arrays["fit_model_v2_per_hz"]),
                             "f0_hz": cal.get("f0_hz"), "q": cal.get("q")}
            probe.mark_dirty()
        res = app.view("resonance")
        _set(res, "res-free-nm", number(cal.get("free_amplitude_nm"), digits=3) if cal.get("free_amplitude_nm") else None)
        drive = shown.series_settings.get("drive") or {}
        _set(res, "res-ratio", number(drive.get("setpoint_ratio")) if drive.get("setpoint_ratio") else None)
        res.show_drive(cal)
    if shown.resonance is not None and "frequency_hz" in shown.resonance.arrays:
        app.view("resonance").show_stored_sweep(shown.resonance.arrays)
    if shown.approach is not None:
        app.view("approach").show_stored(shown.approach.scalars, shown.approach.arrays)
    if shown.series is not None:
        _fill_series_form(app.view("series"), shown.series, shown.series_settings)
        app.view("series").load(shown.series)
    analysis = app.view("analysis")
    if shown.analysis is not None:
        biases = None if shown.series is None else shown.series.biases_v
        analysis.show(shown.analysis, mean_phase_deg=shown.mean_phase_deg, biases_v=biases)
    if shown.report_dir is not None:
        analysis.set_report(str(shown.report_dir))
    for text in shown.notes:
        app.say("info", text)
    app.action_view("series" if shown.series is not None else "probe")


def _fill_series_form(view, data, settings: dict) -> None:
    _set(view, "s-heights", ",".join(number(h * 1e9) for h in data.heights_m))
    _set(view, "s-biases", None if data.biases_v is None else ",".join(number(b) for b in data.biases_v))
    if data.biases_v is None:
        view.query_one("#s-biases", Input).placeholder = "none"
    _set(view, "s-size", number(data.scan_size_m * 1e6))
    _set(view, "s-pixels", data.pixels)
    _set(view, "s-lines", data.lines)
    _set(view, "s-rate", number(data.line_rate_hz))
    view.query_one("#s-repeat", Checkbox).value = bool(data.repeat_first)
    view.show_message(f"stored series {data.name}: {data.completed_lines} of {data.lines} lines at "
                      f"{number_list([h * 1e9 for h in data.heights_m], 'nm')}"
                      + ("" if data.biases_v is None else f" × {quantity(len(data.biases_v), '')} biases"))
