"""Run the field-series analysis on stored data (a session file or a .npz stack), store the result, and the
field-series steps of a whole session (what ``Workflow.field_series`` and ``Workflow.analyse_loop`` call)."""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np

from assistant.procedures.events import Notice, Sink, null_sink

NPZ_KEYS = ("phase_deg", "field_ka_per_m", "pixel_nm")  # required; optional: topography_m


class LoopFileError(ValueError):
    """A stack or session file that holds no analysable field series (the message names the problem)."""


def analyse_npz(path: str | Path, *, tip_moment: str = "up"):
    """Analyse a .npz stack: ``phase_deg`` (fields, rows, cols), ``field_ka_per_m`` (fields,), ``pixel_nm``,
    optional ``topography_m`` (rows, cols)."""
    from assistant.analysis.field_series import analyse_loop

    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except (OSError, ValueError) as exc:
        raise LoopFileError(f"{path}: not a readable .npz stack ({exc})") from None
    missing = [k for k in NPZ_KEYS if k not in data]
    if missing:
        raise LoopFileError(f"{path}: missing key(s) {', '.join(missing)} (needs {', '.join(NPZ_KEYS)}, optional "
                            f"topography_m)")
    pixel = np.asarray(data["pixel_nm"], dtype=float).ravel()
    if pixel.size not in (1, 2) or not np.all(np.isfinite(pixel)) or np.any(pixel <= 0):
        raise LoopFileError(f"{path}: pixel_nm must be one positive spacing or [row, col], got {pixel.tolist()}")
    return analyse_loop(data["phase_deg"], np.asarray(data["field_ka_per_m"], dtype=float) * 1e3,
                        topography_m=data.get("topography_m"), tip_moment=tip_moment,
                        pixel_m=tuple(float(p) * 1e-9 for p in np.broadcast_to(pixel, (2,))))


def analyse_stored(session, name: str | None = None, *, sink: Sink = null_sink, write: bool = True,
                   tip_moment: str = "up"):
    """Analyse field series ``name`` (default: the last) of an open session file; store the result in it."""
    from assistant.analysis.field_series import analyse_loop

    names = session.field_series_names()
    if not names:
        raise LoopFileError(f"{session.path} holds no field series")
    name = name or names[-1]
    if name not in names:
        raise LoopFileError(f"no field series {name!r} in {session.path} (have: {', '.join(names)})")
    data = session.read_field_series(name)
    steps = data.completed_steps
    if steps < 3:
        raise LoopFileError(f"field series {name!r} has {steps} completed field steps; need at least 3")
    result = analyse_loop(data.phase_deg, data.field_a_per_m[:steps], topography_m=data.topography_m,
                          repeat_phase_deg=data.repeat_phase_deg, tip_moment=tip_moment, pixel_m=data.pixel_m)
    if write:
        scalars, arrays = storage_form(result)
        session.write_analysis(name, scalars, arrays)
    for text in result.notes:
        sink(Notice("info", text))
    return result


def storage_form(result) -> tuple[dict, dict]:
    """Scalars and arrays of a loop analysis for ``analysis/<name>/`` (unit suffixes on every name)."""
    scalars = {"analysis": "field series", "elements": int(result.count), "element_source": result.elements.source,
               "coercive_field_a_per_m": result.coercive_a_per_m, "coercive_field_std_a_per_m": result.coercive_std_a_per_m,
               "sfd_sigma_a_per_m": result.sfd_sigma_a_per_m, "sfd_sigma_std_a_per_m": result.sfd_sigma_std_a_per_m,
               "sheppard_sigma_a_per_m": result.sheppard_sigma_a_per_m,
               "tagawa_sigma_a_per_m": result.tagawa_sigma_a_per_m,
               "tagawa_sigma_std_a_per_m": result.tagawa_sigma_std_a_per_m}
    scalars = {k: v for k, v in scalars.items() if not (isinstance(v, float) and not np.isfinite(v))}
    arrays = {"loop_field_a_per_m": result.field_a_per_m, "loop_m_over_ms": result.m_over_ms,
              "switching_down_a_per_m": result.switching_fields_a_per_m("down"),
              "switching_up_a_per_m": result.switching_fields_a_per_m("up"),
              "element_centroid_px": result.elements.centroids_px, "element_labels": result.elements.labels,
              "states": result.states, "drift_px": result.drift_px,
              "tip_reversal_field_a_per_m": np.asarray(result.tip_reversal_fields_a_per_m, dtype=float),
              "tip_switched_elements": np.asarray(result.tip_switched_elements, dtype=np.int64)}
    return scalars, arrays


# ---- the steps of a session (Workflow) ---------------------------------------------------------------------
def workflow_field_series(wf, settings, *, resume: bool = False):
    """Run (or resume) a field series in a workflow's session; the tip must be engaged."""
    from assistant.procedures.field_series import run_field_series
    from assistant.procedures.workflow import WorkflowError

    if wf.approach_result is None or not wf.approach_result.engaged:
        raise WorkflowError("approach first: the field series needs an engaged tip")
    if wf.drive is not None and settings.phase_reference_deg == 0.0:
        settings = dataclasses.replace(settings, phase_reference_deg=wf.drive.phase_reference_deg)
    wf.field_settings = settings
    if resume:
        writer = wf.session.open_field_series_for_resume(settings.name, before_write=wf.before_write)
    else:
        d = json.loads(settings.to_json())
        if wf.drive is not None:
            d["drive"] = wf.drive.__dict__
        d.update(spring_constant_n_per_m=wf.spring_constant_n_per_m, quality_factor=wf.quality_factor,
                 temperature_k=wf.temperature_k)
        writer = wf.session.create_field_series(
            settings.name, fields_a_per_m=settings.fields_a_per_m, lines=settings.lines, pixels=settings.pixels,
            scan_size_m=settings.scan_size_m, line_rate_hz=settings.line_rate_hz, lift_height_m=settings.lift_height_m,
            repeat_first=settings.repeat_first, order=settings.order, settings_json=json.dumps(d),
            field_axis=settings.field_axis, before_write=wf.before_write)
    wf.field_result = run_field_series(wf.controller, settings, writer, limits=wf.limits, sink=wf.sink,
                                       cancel=wf.cancel)
    return wf.field_result


def workflow_analyse_loop(wf, name: str | None = None):
    """Analyse the session's field series (from the session file) after making the stage safe."""
    from assistant.procedures.guard import safety_guard

    with safety_guard(wf.controller, sink=wf.sink):
        wf.controller.make_safe()  # the images are taken: nothing needs the tip, the drive or the field now
    name = name or (wf.field_settings.name if wf.field_settings else None)
    wf.loop_analysis = analyse_stored(wf.session, name, sink=wf.sink)
    return wf.loop_analysis
