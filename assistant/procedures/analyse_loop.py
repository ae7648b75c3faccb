"""The field-series analysis of stored data (a session file or a .npz stack), stored back into the session file
whole, and read back from it (what ``Workflow.analyse_loop``, ``mfma analyze loop``, the report and the terminal
UI call)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from assistant.errors import InputError
from assistant.procedures.events import Notice, Sink, null_sink

NPZ_KEYS = ("phase_deg", "field_ka_per_m", "pixel_nm")  # required; optional: topography_m


class LoopFileError(InputError):
    """A stack or session file that holds no analysable field series (the message names the problem)."""


def analyse_npz(path: str | Path, *, tip_moment: str = "auto"):
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
                   tip_moment: str = "auto"):
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
        session.write_analysis(name, scalars, arrays, result=result.to_record())
    for text in result.notes:
        sink(Notice("info", text))
    from assistant.storage.resume import resumed_sentence

    seams = resumed_sentence(data.resumed_at_lines, data.lines, field_steps=True)
    if seams:
        sink(Notice("warning", f"field series {name!r} was {seams}"))
    return result


def stored_loop_analysis(session, name: str):
    """The loop analysis of field series ``name`` as it was stored with it; a field series that was never
    analysed (an interrupted run) is analysed now, without writing."""
    from assistant.analysis.field_series import LoopAnalysis

    record = session.read_analysis_result(name)
    if record is not None and "field_a_per_m" in record.arrays:  # a loop's, not a decomposition's
        return LoopAnalysis.from_record(record.scalars, record.arrays)
    return analyse_stored(session, name, write=False)


def storage_form(result) -> tuple[dict, dict]:
    """Scalars and arrays of a loop analysis for ``analysis/<name>/`` (unit suffixes on every name)."""
    scalars = {"analysis": "field series", "elements": int(result.count), "element_source": result.elements.source,
               "coercive_field_a_per_m": result.coercive_a_per_m,
               "coercive_field_std_a_per_m": result.coercive_std_a_per_m,
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
