"""The session report: PNG figures and ``summary.md`` with every stored number, its unit and uncertainty.

Everything comes from the session file. Figures of the calibration are drawn by
:mod:`assistant.report.calibration_figures` from the stored spectrum and sweep (refitted, as the calibration
fitted them); figures of the decomposition by :mod:`assistant.report.series_figures` from the decomposition
stored with each series, or, for a series never analysed (an interrupted run), from a decomposition computed
now and not written; field series likewise through :mod:`assistant.report.loop_report` and
:mod:`assistant.report.loop_figures` from their stored loop analysis; stray-field maps by
:mod:`assistant.report.field_figures` from the maps stored in ``field_map/``. The media section
(:mod:`assistant.report.media_report`) reads each series' image at the height the stored decomposition chose and
reports its orientation and recorded tracks. A failing figure is written down as a note in the summary instead of
stopping the report.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from pathlib import Path

from assistant.formatting import yes_no
from assistant.procedures.events import Progress, Sink, null_sink
from assistant.report import field_figures, sections
from assistant.report.imaging_sections import imaging_section
from assistant.report.calibration_figures import write_sweep_figure, write_thermal_figure
from assistant.report.imaging_figures import write_imaging_figures
from assistant.report.figure_jobs import FigureJobs, Job
from assistant.analysis.background import remove_plane
from assistant.report.loop_report import field_series_report
from assistant.report.media_report import media_section
from assistant.report.series_figures import write_series_figures
from assistant.report.series_images import series_image_jobs
from assistant.storage import Record, SeriesData, SessionFile


@dataclass(frozen=True)
class ReportResult:
    """What :func:`build_report` wrote: every file (figures and ``summary.md``) and the summary's text."""

    out_dir: Path
    paths: tuple[Path, ...]
    summary_text: str
    notes: tuple[str, ...]


# ---- numbers -------------------------------------------------------------------------------------------------
def format_value(value: float, std: float | None = None) -> str:
    """``value ± std`` with the uncertainty to two significant digits and the value to the same place."""
    from assistant.formatting import number

    return number(value, std, digits=6)


def _series_images(data: SeriesData, out_dir: Path, jobs: FigureJobs, *, per_height_scale: bool = False
                   ) -> list[Job]:
    return [jobs.submit(what, lambda job=job: job)
            for what, job in series_image_jobs(data, out_dir, per_height_scale=per_height_scale)]


# ---- figures of the calibration and of the decomposition --------------------------------------------------
def _calibration_figures(session: SessionFile, out_dir: Path, jobs: FigureJobs) -> list[Job]:
    """The thermal spectrum and the drive sweep, refitted here from the stored records and drawn as jobs."""
    from assistant.analysis.calibration import fit_drive_sweep

    found: list[Job] = []
    cals = session.read_calibrations()
    if cals and "spectrum_psd_v2_per_hz" in cals[-1].arrays:
        found.append(jobs.submit("thermal spectrum figure", lambda: (
            write_thermal_figure, (_thermal_result(cals[-1]), out_dir / "thermal.png"), {})))
    resonance = session.read_resonance()
    if resonance is not None and "frequency_hz" in resonance.arrays:
        a = resonance.arrays
        found.append(jobs.submit("resonance sweep figure", lambda: (
            write_sweep_figure, (fit_drive_sweep(a["frequency_hz"], a["amplitude_v"], a["phase_deg"]),
                                 out_dir / "sweep.png"), {})))
    return found


def _thermal_result(record: Record):
    """The stored calibration's thermal result, refitted so the figure shows the fit the numbers came from.

    The route of the stored calibration is kept: on the non-contact path k came from Sader and InvOLS from this
    spectrum, so the figure converts with that k (showing a thermal k there would be circular).
    """
    from assistant.analysis.calibration import calibrate_thermal
    from assistant.procedures.analyse import stored_thermal_fit

    s = record.scalars
    fit = stored_thermal_fit(record)
    temperature = float(s.get("temperature_k", 298.15))
    if str(s.get("invols_source", "")).startswith("non-contact") and "k_n_per_m" in s:
        return calibrate_thermal(fit, temperature_k=temperature, k_n_per_m=float(s["k_n_per_m"]),
                                 k_std_n_per_m=float(s.get("k_std_n_per_m", 0.0)))
    invols = s.get("invols_nm_per_v")
    return calibrate_thermal(fit, temperature_k=temperature,
                             invols_m_per_v=None if invols is None else float(invols) * 1e-9,
                             invols_std_m_per_v=float(s.get("invols_std_nm_per_v", 0.0)) * 1e-9)


def _decomposition_figures(session: SessionFile, out_dir: Path, jobs: FigureJobs, *, per_height_scale: bool = False,
                           computed: dict | None = None) -> list[Job]:
    """The decomposition figures of every series, from the decomposition stored with it (computed now for a
    series that has none); ``computed`` receives the decompositions that were computed here."""
    from assistant.procedures.analyse import stored_series_analysis

    found: list[Job] = []
    names = session.series_names()
    for name in names:
        target = out_dir if len(names) == 1 else out_dir / f"{name}_decomposition"
        target.mkdir(exist_ok=True)

        def prepare(name: str = name, target: Path = target) -> tuple:
            result = stored_series_analysis(session, name)
            if computed is not None and name not in session.analysis_names():
                computed[name] = result
            if getattr(result, "kind", None) == "imaging":  # one or two heights: no decomposition to draw
                return write_imaging_figures, (result, session.read_series(name), target), {}
            return write_series_figures, (result, target), {"per_height_scale": per_height_scale}
        found.append(jobs.submit(f"decomposition figures of {name!r}", prepare))
    return found


def _resolved(jobs: FigureJobs, found: list[Job], notes: list[str]) -> list[Path]:
    return [path for job in found for path in jobs.paths(job, notes)]


def _field_map_figures(session: SessionFile, out_dir: Path, notes: list[str]) -> list[Path]:
    """The stray-field maps stored in the session (and the TTF that made the last one, if its tip file is there),
    drawn here: they read the session (and a tip file) as they go."""
    here = FigureJobs(processes=1)
    return here.paths(here.submit("field-map figures", lambda: (
        field_figures.figures_from_session, (session, out_dir), {})), notes)


# ---- the report -----------------------------------------------------------------------------------------------
def build_report(session_path: str | os.PathLike[str], out_dir: str | os.PathLike[str], *, sink: Sink = null_sink,
                 per_height_scale: bool = False, processes: int | None = None) -> ReportResult:
    """Write the figures a session file supports and ``summary.md`` into ``out_dir`` (created if needed).

    ``sink`` receives ``Progress("report", done, total, "figure groups")`` as the figures are written.
    ``per_height_scale`` gives each lift height's phase map its own colour scale (the captions say so).
    ``processes``: worker processes drawing the figures (None: :func:`.figure_jobs.report_processes`; 1 draws
    them in this process).
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    notes: list[str] = []
    paths: list[Path] = []
    t0 = time.monotonic()
    with FigureJobs(processes) as jobs, SessionFile.open(session_path, "r") as session:
        names = session.series_names()
        field_names = session.field_series_names()
        steps = 2 + len(names) + (2 if names else 0) + (1 if field_names else 0)
        maps = session.field_map_names()
        steps += 1 if maps else 0
        done = 0

        def step(what: str) -> None:
            nonlocal done
            done += 1
            sink(Progress("report", done, steps, "figure groups", time.monotonic() - t0, data={"step": what}))

        sink(Progress("report", 0, steps, "figure groups", 0.0))
        info = session.info()
        cals = session.read_calibrations()
        stored = session.analysis_names()
        series_data = {name: session.read_series(name) for name in names}
        # every figure job is sent off first (with worker processes they draw while the text is put together)
        image_jobs = {name: _series_images(series_data[name], out, jobs, per_height_scale=per_height_scale)
                      for name in names}
        calibration_jobs = _calibration_figures(session, out, jobs)
        computed: dict = {}
        decomposition_jobs = (_decomposition_figures(session, out, jobs, per_height_scale=per_height_scale,
                                                     computed=computed) if names else [])
        body: list[str] = []
        if cals:
            body += ["## Probe calibration", ""]
            for rec in cals:
                body += sections.record_section(rec.path, rec.scalars, rec.arrays, rec.units)
        for title, rec in (("Resonance", session.read_resonance()), ("Approach", session.read_approach())):
            if rec is not None:
                body += [f"## {title}", ""] + sections.record_section(rec.path, rec.scalars, rec.arrays, rec.units)
        if names:
            body += ["## Lift-height series", ""]
        for name in names:
            data = series_data[name]
            topo = remove_plane(data.topography_m) * 1e9 if data.completed_lines else None
            body += sections.series_section(data, topo)
            paths += _resolved(jobs, image_jobs[name], notes)
            step(f"phase maps of {name}")
        if field_names:
            more_text, more_paths, loop_results = field_series_report(session, out, notes)
            body += more_text
            paths += more_paths
            step("field-series figures")
        analysed: list[tuple[str, dict]] = []
        for name in stored:
            if name in field_names:  # a loop analysis: in the field-series section above
                continue
            rec = session.read_analysis(name)
            analysed.append((name, {**rec.scalars, **rec.arrays}))
        if analysed:
            body += ["## Decomposition" if all(d.get("kind") != "imaging" for _, d in analysed) else "## Analysis", ""]
            for name, d in analysed:
                grid = series_data[name].biases_v if name in series_data else None
                if d.get("kind") == "imaging":  # one or two heights: what was measured, no decomposition
                    body += imaging_section(name, d)
                    continue
                body += sections.analysis_section(name, d, grid)
        paths += _resolved(jobs, calibration_jobs, notes)
        step("calibration figures")
        if names:
            paths += _resolved(jobs, decomposition_jobs, notes)
            step("decomposition figures")
            if not analysed:  # nothing stored, but decomposed for the figures: the results still open the summary
                analysed = [(n, r.to_dict()) for n, r in computed.items() if hasattr(r, "to_dict")]
            media_text, media_paths = media_section(session_path, out, notes)
            body += media_text
            paths += media_paths
            step("media")
        if maps:
            body += ["## Stray-field maps (quantitative MFM)", "",
                     "Hz in A/m (μ0 Hz in mT in the figure); z away from the sample; the measurement plane is the "
                     "closest approach of the oscillating tip.", ""]
            for name in maps:
                rec = session.read_field_map(name)
                body += sections.record_section(f"field_map/{name}", rec.scalars, rec.arrays, rec.units)
            paths += _field_map_figures(session, out, notes)
            step("field-map figures")
        title = [f"# Session report: {Path(session_path).name}", ""]
        results = sections.results_section(analysed, dict(cals[-1].scalars) if cals else None)
        if field_names:  # the loops lead; without a lift series there is no decomposition to miss
            rest = [ln for ln in results[2:] if names or "Decomposition:" not in ln]
            results = results[:2] + loop_results + [ln for i, ln in enumerate(rest) if ln or (i and rest[i - 1])]
        title += results
        title += ["## Session", "",
                  f"- file format: {info.format} version {info.format_version}; software {info.software_version}",
                  f"- created (UTC): {info.created_utc}",
                  f"- controller: {info.controller_url}",
                  f"- session complete: {yes_no(info.complete)}" + ("" if info.complete else
                                                                      " (interrupted or still running)"), ""]
        appendix = []
        if info.scenario_text is not None:
            appendix += ["### Scenario of the simulated stage", "", "```toml", info.scenario_text.rstrip(), "```", ""]
        for name in names:
            appendix += sections.settings_appendix(series_data[name])
    text = title + body + ["## Figures", ""]
    for p in paths:
        rel = p.relative_to(out).as_posix()
        cap = sections.caption(rel, per_height_scale=per_height_scale)
        text.append(f"- {rel}" + (f": {cap}" if cap else ""))
    text.append("")
    if notes:
        text += ["## Notes", ""] + [f"- {n}" for n in notes] + [""]
    if appendix:
        text += ["## Appendix", ""] + appendix
    summary = "\n".join(text)
    summary_path = out / "summary.md"
    summary_path.write_text(summary, encoding="utf-8")
    step("summary")
    return ReportResult(out_dir=out, paths=(*paths, summary_path), summary_text=summary, notes=tuple(notes))
