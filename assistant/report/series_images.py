"""The stored images of a lift-height series as PNG files: topography and the phase at every lift height.

Module-level writers taking plain arrays, so that a worker process can draw them (:mod:`.figure_jobs`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from assistant.report.images import phase_figure, phase_figures_over_biases, save_png, topography_figure


def write_topography(topography_m: np.ndarray, path: Path, *, scan_size_m: float, lines: int, title: str) -> Path:
    """Topography (plane removed) of a series as a PNG."""
    return save_png(topography_figure(topography_m, scan_size_m=scan_size_m, lines=lines, title=title), path)


def write_phase(phase_deg: np.ndarray, path: Path, *, heights_m: np.ndarray, scan_size_m: float, lines: int,
                title: str, repeat_phase_deg: np.ndarray | None = None, per_height_scale: bool = False) -> Path:
    """The phase at every lift height (and the repeat of the first, if given) as a PNG."""
    fig = phase_figure(phase_deg, heights_m=heights_m, scan_size_m=scan_size_m, repeat_phase_deg=repeat_phase_deg,
                       lines=lines, title=title, per_height_scale=per_height_scale)
    return save_png(fig, path)


def series_image_jobs(data, out_dir: Path, *, per_height_scale: bool = False) -> list[tuple[str, tuple]]:
    """``(what, (writer, args, kwargs))`` for each image file of a series: topography, then the phase (one file
    per tip bias with a bias grid). One or two heights: topography only (the imaging overview shows the rest)."""
    if data.completed_lines == 0:
        return []
    common = {"scan_size_m": data.scan_size_m, "lines": data.lines}
    jobs = [(f"topography of {data.name!r}", (write_topography, (data.topography_m, out_dir /
             f"{data.name}_topography.png"), {**common, "title": f"{data.name}: topography"}))]
    if len(data.heights_m) < 3:
        return jobs
    phase = {**common, "heights_m": data.heights_m, "per_height_scale": per_height_scale}
    if data.biases_v is None:
        jobs.append((f"phase maps of {data.name!r}", (write_phase, (data.phase_deg, out_dir / f"{data.name}_phase.png"),
                     {**phase, "title": f"{data.name}: phase", "repeat_phase_deg": data.repeat_phase_deg})))
        return jobs
    titles = [f"{data.name}: phase at tip bias {bias:+.3g} V" for bias in data.biases_v]
    paths = [out_dir / f"{data.name}_phase_bias{j}.png" for j in range(len(data.biases_v))]
    if per_height_scale:  # each panel has its own scale and bar: a figure per bias
        for j, title in enumerate(titles):
            jobs.append((f"phase maps of {data.name!r} at {data.biases_v[j]:+.3g} V",
                         (write_phase, (data.phase_deg[:, j], paths[j]), {**phase, "title": title})))
        return jobs
    jobs.append((f"phase maps of {data.name!r} at every tip bias",
                 (phase_figures_over_biases, (data.phase_deg, paths),
                  {**common, "heights_m": data.heights_m, "titles": titles})))
    return jobs
