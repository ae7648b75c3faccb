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
import json
import math
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from assistant.report.images import phase_figure, remove_plane, save_png, topography_figure
from assistant.storage.session_file import Record, SeriesData, SessionFile, unit_for_name

_MAX_LISTED = 64  # arrays up to this many values are written out in full


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
    if not math.isfinite(value):
        return str(value)
    if std is None or not math.isfinite(std) or std <= 0:
        return f"{value:.6g}"
    decimals = 1 - math.floor(math.log10(std))
    if -6 <= decimals <= 6 and abs(value) < 1e7:
        d = max(decimals, 0)
        return f"{round(value, decimals):.{d}f} ± {round(std, decimals):.{d}f}"
    exponent = math.floor(math.log10(abs(value))) if value != 0 else math.floor(math.log10(std))
    scale = 10.0**exponent
    d = max(decimals + exponent, 0)
    return f"({value / scale:.{d}f} ± {std / scale:.{d}f})e{exponent:+d}"


def _std_name(name: str, names: Mapping[str, object]) -> str | None:
    """The uncertainty that goes with ``name``: ``k_n_per_m`` -> ``k_std_n_per_m``, ``q`` -> ``q_std``."""
    tokens = name.split("_")
    candidates = [f"{name}_std"] + ["_".join(tokens[:-n] + ["std"] + tokens[-n:]) for n in (1, 2, 3)
                                    if len(tokens) > n]
    return next((c for c in candidates if c in names and c != name), None)


def _scalar_rows(scalars: Mapping[str, object], units: Mapping[str, str]) -> list[str]:
    rows = ["| quantity | value | unit |", "|---|---|---|"]
    paired = {s for n in scalars if (s := _std_name(n, scalars))}
    for name, value in scalars.items():
        if name in paired:
            continue
        unit = units.get(name, unit_for_name(name))
        if isinstance(value, (bool, np.bool_)) or isinstance(value, str):
            rows.append(f"| {name} | {value} | |")
            continue
        std_key = _std_name(name, scalars)
        std = scalars.get(std_key) if std_key else None
        shown = format_value(float(value), float(std) if isinstance(std, (int, float)) else None)
        rows.append(f"| {name} | {shown} | {unit or '1'} |")
    return rows if len(rows) > 2 else []


def _array_lines(arrays: Mapping[str, np.ndarray], units: Mapping[str, str]) -> list[str]:
    lines = []
    paired = {s for n in arrays if (s := _std_name(n, arrays))}
    for name, values in arrays.items():
        if name in paired:
            continue
        unit = units.get(name, unit_for_name(name))
        values = np.asarray(values, dtype=np.float64)
        std_key = _std_name(name, arrays)
        std = np.asarray(arrays[std_key], dtype=np.float64) if std_key else None
        if values.size <= _MAX_LISTED:
            if std is not None and std.shape == values.shape:
                text = ", ".join(format_value(v, s) for v, s in zip(values.ravel(), std.ravel()))
            else:
                text = ", ".join(f"{v:.6g}" for v in values.ravel())
            shape = "" if values.ndim <= 1 else f" (shape {values.shape}, row-major)"
            lines.append(f"- {name} [{unit or '1'}]{shape}: {text}")
        else:
            finite = values[np.isfinite(values)]
            span = f"{finite.min():.6g} .. {finite.max():.6g}" if finite.size else "no finite values"
            lines.append(f"- {name} [{unit or '1'}]: {values.shape} values, {span}")
    return lines


def _record_section(title: str, record: Record) -> list[str]:
    out = [f"### {title}", ""]
    scalars = {k: v for k, v in record.scalars.items() if k not in ("auxiliary_signals",)}
    out += _scalar_rows(scalars, record.units)
    arrays = _array_lines(record.arrays, record.units)
    if arrays:
        out += ["", "Arrays:"] + arrays
    return out + [""]


# ---- series -------------------------------------------------------------------------------------------------
def _series_section(data: SeriesData) -> list[str]:
    heights = ", ".join(f"{h * 1e9:.4g}" for h in data.heights_m)
    biases = "none" if data.biases_v is None else ", ".join(f"{b:.4g}" for b in data.biases_v)
    status = "finished" if data.finished else "partial"
    out = [f"### Series {data.name}", "",
           f"- lift heights (nm): {heights}", f"- tip biases (V): {biases}",
           f"- completed lines: {data.completed_lines} of {data.lines} ({status})",
           f"- frame: {data.scan_size_m * 1e6:.4g} µm square, {data.pixels} pixels x {data.lines} lines, "
           f"line rate {data.line_rate_hz:.4g} Hz, order {data.order}",
           f"- repeat of the first height at the end of each line: {'yes' if data.repeat_first else 'no'}", ""]
    if data.completed_lines == 0:
        return out + ["No completed lines.", ""]
    topo = remove_plane(data.topography_m) * 1e9
    finite = topo[np.isfinite(topo)]
    if finite.size:
        out += [f"Topography after plane removal: rms {np.std(finite):.4g} nm, "
                f"range {finite.min():.4g} .. {finite.max():.4g} nm.", ""]
    out += ["Phase over the completed lines (deg):", "",
            "| lift (nm) | bias (V) | mean | rms about mean | min | max | NaN pixels |",
            "|---|---|---|---|---|---|---|"]
    phase = data.phase_deg if data.biases_v is not None else data.phase_deg[:, None]
    bias_labels = ["-"] if data.biases_v is None else [f"{b:.4g}" for b in data.biases_v]
    for i, h in enumerate(data.heights_m):
        for j, b in enumerate(bias_labels):
            out.append(_stats_row(f"{h * 1e9:.4g}", b, phase[i, j]))
    if data.repeat_phase_deg is not None:
        out.append(_stats_row(f"{data.heights_m[0] * 1e9:.4g} (repeat)", "-", data.repeat_phase_deg))
    return out + ["", "Series settings (JSON, as stored for a resume):", "", "```json",
                  json.dumps(json.loads(data.settings_json), indent=1, sort_keys=True), "```", ""]


def _stats_row(lift: str, bias: str, image: np.ndarray) -> str:
    v = image[np.isfinite(image)]
    nan = int(image.size - v.size)
    if not v.size:
        return f"| {lift} | {bias} | - | - | - | - | {nan} |"
    return f"| {lift} | {bias} | {v.mean():.4g} | {v.std():.4g} | {v.min():.4g} | {v.max():.4g} | {nan} |"


def _series_images(data: SeriesData, out_dir: Path) -> list[Path]:
    if data.completed_lines == 0:
        return []
    paths = [save_png(topography_figure(data.topography_m, scan_size_m=data.scan_size_m, lines=data.lines,
                                        title=f"{data.name}: topography"), out_dir / f"{data.name}_topography.png")]
    if len(data.heights_m) < 3:  # one or two heights: the imaging overview shows every image on one scale
        return paths
    if data.biases_v is None:
        fig = phase_figure(data.phase_deg, heights_m=data.heights_m, scan_size_m=data.scan_size_m,
                           repeat_phase_deg=data.repeat_phase_deg, lines=data.lines, title=f"{data.name}: phase")
        paths.append(save_png(fig, out_dir / f"{data.name}_phase.png"))
        return paths
    for j, bias in enumerate(data.biases_v):
        fig = phase_figure(data.phase_deg[:, j], heights_m=data.heights_m, scan_size_m=data.scan_size_m,
                           lines=data.lines, title=f"{data.name}: phase at tip bias {bias:+.3g} V")
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
                           analyses: Mapping[str, object] | None = None) -> list[Path]:
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
            if getattr(result, "kind", None) == "imaging":  # one or two heights: no decomposition to draw
                from assistant.report.imaging_figures import write_imaging_figures

                write_imaging_figures(result, session.read_series(name), target)
                return
            mod.write_series_figures(result, target)
        paths += _new_files(target, write, f"decomposition figures of {name!r}", notes)
    return paths


# ---- the report -----------------------------------------------------------------------------------------------
def build_report(session_path: str | os.PathLike[str], out_dir: str | os.PathLike[str], *,
                 analyses: Mapping[str, object] | None = None) -> ReportResult:
    """Write the figures a session file supports and ``summary.md`` into ``out_dir`` (created if needed).

    ``analyses`` maps series names to decompositions the caller already has, so they are not computed again.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    notes: list[str] = []
    paths: list[Path] = []
    with SessionFile.open(session_path, "r") as session:
        info = session.info()
        text = [f"# Session report: {Path(session_path).name}", "",
                f"- format: {info.format} version {info.format_version}; software {info.software_version}",
                f"- created (UTC): {info.created_utc}",
                f"- controller: {info.controller_url}",
                f"- session complete: {'yes' if info.complete else 'no (interrupted or still running)'}", ""]
        if info.scenario_text is not None:
            text += ["## Scenario of the simulated stage", "", "```toml", info.scenario_text.rstrip(), "```", ""]
        cals = session.read_calibrations()
        if cals:
            text += ["## Probe calibrations", ""]
            for rec in cals:
                text += _record_section(rec.path, rec)
        for title, rec in (("Resonance", session.read_resonance()), ("Approach", session.read_approach())):
            if rec is not None:
                text += [f"## {title}", ""] + _record_section(rec.path, rec)
        names = session.series_names()
        if names:
            text += ["## Lift-height series", ""]
        for name in names:
            data = session.read_series(name)
            text += _series_section(data)
            paths += _series_images(data, out)
        stored = session.analysis_names()
        if stored:
            text += ["## Analysis", ""]
            for name in stored:
                record = session.read_analysis(name)
                if record.scalars.get("kind") == "imaging":  # say first what was and was not computed
                    text += [str(record.scalars[k]) + "\n" for k in ("decomposition", "noise_sentence",
                             "cpd_sentence", "tip_change") if k in record.scalars]
                text += _record_section(f"analysis/{name}", record)
        paths += _calibration_figures(session, out, notes)
        if names:
            paths += _decomposition_figures(session, out, notes, analyses)
    text += ["## Figures", ""] + [f"- {p.relative_to(out)}" for p in paths] + [""]
    if notes:
        text += ["## Notes", ""] + [f"- {n}" for n in notes] + [""]
    summary = "\n".join(text)
    summary_path = out / "summary.md"
    summary_path.write_text(summary, encoding="utf-8")
    return ReportResult(out_dir=out, paths=(*paths, summary_path), summary_text=summary, notes=tuple(notes))
