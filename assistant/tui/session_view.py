"""Adapters between stored data and the views: what a session file holds."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np


@dataclass
class StoredSession:
    """What the views show of a session file."""

    calibration: dict | None = None
    calibration_arrays: dict = field(default_factory=dict)
    resonance: object | None = None  # Record of the drive sweep
    approach: object | None = None  # Record of the approach
    series_settings: dict = field(default_factory=dict)  # the stored settings of the last series (JSON)
    report_dir: Path | None = None  # its report folder, when one was written
    probe_name: str | None = None
    series: object | None = None  # SeriesData of the last series
    analysis: dict | None = None  # stored analysis of that series: scalars and arrays together
    mean_phase_deg: np.ndarray | None = None
    notes: list[str] = field(default_factory=list)


def image_means(phase_deg: np.ndarray) -> np.ndarray | None:
    """Mean phase of each height's image (bias-averaged for a bias grid), NaN pixels ignored."""
    phase = np.asarray(phase_deg, dtype=float)
    if phase.ndim < 3 or phase.shape[-2] == 0:
        return None
    axes = tuple(range(1, phase.ndim))
    with np.errstate(invalid="ignore"):
        finite = np.isfinite(phase).sum(axis=axes)
        total = np.where(np.isfinite(phase), phase, 0.0).sum(axis=axes)
        return np.where(finite > 0, total / np.maximum(finite, 1), np.nan)


def load_session(path: str | Path) -> StoredSession:
    """Read a session file (read-only) into a :class:`StoredSession`."""
    from assistant.storage.session_file import SessionFile

    out = StoredSession()
    with SessionFile.open(Path(path), "r") as sf:
        info = sf.info()
        out.notes.append(f"opened {path}: created {info.created_utc}, controller {info.controller_url}, "
                         f"{'complete' if info.complete else 'incomplete'}")
        cals = sf.read_calibrations()
        if cals:
            out.calibration = dict(cals[-1].scalars)
            out.calibration_arrays = dict(cals[-1].arrays)
            name = out.calibration.get("probe_name")
            out.probe_name = str(name) if name else None
        out.resonance = sf.read_resonance()
        out.approach = sf.read_approach()
        names = sf.series_names()
        if names:
            out.series = sf.read_series(names[-1])
            try:
                out.series_settings = json.loads(out.series.settings_json or "{}")
            except ValueError:
                out.series_settings = {}
            out.mean_phase_deg = image_means(out.series.phase_deg)
            out.notes.append(f"series {names[-1]}: {out.series.completed_lines} of {out.series.lines} lines, "
                             f"{len(out.series.heights_m)} heights")
            if names[-1] in sf.analysis_names():
                rec = sf.read_analysis(names[-1])
                out.analysis = {**rec.scalars, **rec.arrays}
        if out.series is None:
            out.notes.append("the file holds no series")
    from assistant.outputs import report_dir_for

    report = report_dir_for(path)
    if (report / "summary.md").is_file():
        out.report_dir = report
    return out
