"""The session report: PNG figures and ``summary.md`` with every stored number, its unit and uncertainty.

Figures of the calibration and of the decomposition come from ``assistant.report.calibration_figures`` and
``assistant.report.series_figures``. Each is used through ``figures_from_session(session, out_dir) ->
list[Path]`` when it offers that; otherwise through the figure functions it is known to offer
(``write_thermal_figure`` or ``thermal_figure``, ``write_sweep_figure`` or ``sweep_figure``,
``write_series_figures``). A missing module or a failing figure is written down as a note in the summary
instead of stopping the report.
"""

from __future__ import annotations

import importlib
import os
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from assistant.formatting import yes_no
from assistant.procedures.events import Progress, Sink, null_sink
from assistant.report import sections
from assistant.report.images import phase_figure, remove_plane, save_png, topography_figure
from assistant.storage.session_file import Record, SeriesData, SessionFile


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


def _series_images(data: SeriesData, out_dir: Path, *, per_height_scale: bool = False) -> list[Path]:
    if data.completed_lines == 0:
        return []
    paths = [save_png(topography_figure(data.topography_m, scan_size_m=data.scan_size_m, lines=data.lines,
                                        title=f"{data.name}: topography"), out_dir / f"{data.name}_topography.png")]
    if data.biases_v is None:
        fig = phase_figure(data.phase_deg, heights_m=data.heights_m, scan_size_m=data.scan_size_m,
                           repeat_phase_deg=data.repeat_phase_deg, lines=data.lines, title=f"{data.name}: phase",
                           per_height_scale=per_height_scale)
        paths.append(save_png(fig, out_dir / f"{data.name}_phase.png"))
        return paths
    for j, bias in enumerate(data.biases_v):
        fig = phase_figure(data.phase_deg[:, j], heights_m=data.heights_m, scan_size_m=data.scan_size_m,
                           lines=data.lines, title=f"{data.name}: phase at tip bias {bias:+.3g} V",
                           per_height_scale=per_height_scale)
        paths.append(save_png(fig, out_dir / f"{data.name}_phase_bias{j}.png"))
    return paths


# ---- colleagues' figure modules -------------------------------------------------------------------------------
def _import_figures(module: str, notes: list[str]):
    name = f"assistant.report.{module}"
    try:
        return importlib.import_module(name)
    except ModuleNotFoundError as exc:
        if exc.name != name:
            raise
        notes.append(f"{name} is not installed: its figures were skipped")
        return None


def _new_files(directory: Path, action: Callable[[], object], what: str, notes: list[str]) -> list[Path]:
    """Run a figure writer; the files it added under ``directory`` (whatever it returns), or a note on failure."""
    def stamps() -> dict[Path, int]:
        return {p: p.stat().st_mtime_ns for p in directory.rglob("*") if p.is_file()}

    before = stamps()
    try:
        action()
    except Exception as exc:  # one figure must not cost the whole report; the note says what went wrong
        notes.append(f"{what} failed: {type(exc).__name__}: {exc}")
    return sorted(p for p, stamp in stamps().items() if before.get(p) != stamp)  # new or rewritten


def _figure_writer(mod, base: str) -> Callable[[object, Path], object] | None:
    """``write_<base>(result, path)`` if the module has it, else ``<base>(result) -> Figure`` saved as PNG."""
    if hasattr(mod, f"write_{base}"):
        return getattr(mod, f"write_{base}")
    if hasattr(mod, base):
        return lambda result, path: save_png(getattr(mod, base)(result), path)
    return None


def _calibration_figures(session: SessionFile, out_dir: Path, notes: list[str]) -> list[Path]:
    mod = _import_figures("calibration_figures", notes)
    if mod is None:
        return []
    if hasattr(mod, "figures_from_session"):
        return _new_files(out_dir, lambda: mod.figures_from_session(session, out_dir), "calibration figures", notes)
    paths: list[Path] = []
    cals = session.read_calibrations()
    thermal = _figure_writer(mod, "thermal_figure")
    if cals and thermal is not None and "spectrum_psd_v2_per_hz" in cals[-1].arrays:
        paths += _new_files(out_dir, lambda: thermal(_thermal_result(cals[-1]), out_dir / "thermal.png"),
                            "thermal spectrum figure", notes)
    resonance = session.read_resonance()
    sweep = _figure_writer(mod, "sweep_figure")
    if resonance is not None and sweep is not None and "frequency_hz" in resonance.arrays:
        def write_sweep() -> None:
            from assistant.analysis.sweep import fit_drive_sweep

            a = resonance.arrays
            sweep(fit_drive_sweep(a["frequency_hz"], a["amplitude_v"], a["phase_deg"]), out_dir / "sweep.png")
        paths += _new_files(out_dir, write_sweep, "resonance sweep figure", notes)
    return paths


def _thermal_result(record: Record):
    """Refit the stored thermal spectrum so the calibration figure shows the fit the numbers came from.

    The route of the stored calibration is kept: on the non-contact path k came from Sader and InvOLS from this
    spectrum, so the figure converts with that k (showing a thermal k there would be circular).
    """
    from assistant.analysis import thermal as th
    from assistant.analysis.spectra import WelchSpectrum

    s, a = record.scalars, record.arrays
    f = a["spectrum_frequency_hz"]
    # a one-sided spectrum runs from 0 to Nyquist in segment_length / 2 + 1 bins
    spectrum = WelchSpectrum(f, a["spectrum_psd_v2_per_hz"],
                             rate_hz=float(s.get("spectrum_rate_hz", 2.0 * f[-1])),
                             segment_length=int(s.get("spectrum_segment_length", 2 * (f.size - 1))),
                             n_segments=int(s["spectrum_segments"]),
                             variance_inflation=float(s.get("spectrum_variance_inflation", 1.0)))
    fit = th.fit_thermal_spectrum(spectrum.frequencies_hz, spectrum.psd_v2_per_hz, averages=spectrum.n_segments,
                                  variance_inflation=spectrum.variance_inflation, spectrum=spectrum)
    temperature = float(s.get("temperature_k", 298.15))
    if str(s.get("invols_source", "")).startswith("non-contact") and "k_n_per_m" in s:
        return th.calibrate_thermal(fit, temperature_k=temperature, k_n_per_m=float(s["k_n_per_m"]),
                                    k_std_n_per_m=float(s.get("k_std_n_per_m", 0.0)))
    invols = s.get("invols_nm_per_v")
    return th.calibrate_thermal(fit, temperature_k=temperature,
                                invols_m_per_v=None if invols is None else float(invols) * 1e-9,
                                invols_std_m_per_v=float(s.get("invols_std_nm_per_v", 0.0)) * 1e-9)


def _decomposition_figures(session: SessionFile, out_dir: Path, notes: list[str],
                           analyses: Mapping[str, object] | None = None, *, per_height_scale: bool = False,
                           computed: dict | None = None) -> list[Path]:
    mod = _import_figures("series_figures", notes)
    if mod is None:
        return []
    if hasattr(mod, "figures_from_session"):
        return _new_files(out_dir, lambda: mod.figures_from_session(session, out_dir), "series figures", notes)
    if not hasattr(mod, "write_series_figures"):
        notes.append("assistant.report.series_figures offers neither figures_from_session nor "
                     "write_series_figures: decomposition figures were skipped")
        return []
    paths: list[Path] = []
    names = session.series_names()
    for name in names:
        target = out_dir if len(names) == 1 else out_dir / f"{name}_decomposition"
        target.mkdir(exist_ok=True)

        def write(name: str = name, target: Path = target) -> None:
            result = (analyses or {}).get(name)
            if result is None:  # not handed in by the caller: decompose the stored series again
                from assistant.procedures.analyse import analyse_session_series

                result = analyse_session_series(session, name, write=False)
            if computed is not None:
                computed[name] = result
            if per_height_scale:
                mod.write_series_figures(result, target, per_height_scale=True)
            else:
                mod.write_series_figures(result, target)
        paths += _new_files(target, write, f"decomposition figures of {name!r}", notes)
    return paths


# ---- the report -----------------------------------------------------------------------------------------------
def build_report(session_path: str | os.PathLike[str], out_dir: str | os.PathLike[str], *,
                 analyses: Mapping[str, object] | None = None, sink: Sink = null_sink,
                 per_height_scale: bool = False) -> ReportResult:
    """Write the figures a session file supports and ``summary.md`` into ``out_dir`` (created if needed).

    ``analyses`` maps series names to decompositions the caller already has, so they are not computed again.
    ``sink`` receives ``Progress("report", done, total, "figure groups")`` as the figures are written.
    ``per_height_scale`` gives each lift height's phase map its own colour scale (the captions say so).
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    notes: list[str] = []
    paths: list[Path] = []
    t0 = time.monotonic()
    with SessionFile.open(session_path, "r") as session:
        names = session.series_names()
        steps = 2 + len(names) + (1 if names else 0)
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
            paths += _series_images(data, out, per_height_scale=per_height_scale)
            step(f"phase maps of {name}")
        analysed: list[tuple[str, dict]] = []
        for name in stored:
            rec = session.read_analysis(name)
            analysed.append((name, {**rec.scalars, **rec.arrays}))
        if analysed:
            body += ["## Decomposition", ""]
            for name, d in analysed:
                grid = series_data[name].biases_v if name in series_data else None
                body += sections.analysis_section(name, d, grid)
        paths += _calibration_figures(session, out, notes)
        step("calibration figures")
        if names:
            computed: dict = {}
            paths += _decomposition_figures(session, out, notes, analyses, per_height_scale=per_height_scale,
                                            computed=computed)
            step("decomposition figures")
            if not analysed:  # nothing stored, but decomposed for the figures: the results still open the summary
                analysed = [(n, r.to_dict()) for n, r in computed.items() if hasattr(r, "to_dict")]
        title = [f"# Session report: {Path(session_path).name}", ""]
        title += sections.results_section(analysed, dict(cals[-1].scalars) if cals else None)
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
