"""The text of ``summary.md``, section by section: readable names, numbers with their units and uncertainties.

Stored records keep their keys (``k_n_per_m``); here they read "spring constant k | 2.719 ± 0.093 N/m". Flags
read yes/no, dimensionless numbers carry no unit, and long arrays are summarised by their count and range.
"""

from __future__ import annotations

import json
from collections.abc import Mapping

import numpy as np

from assistant.formatting import DASH, number, number_list, quantity, unit_text, yes_no
from assistant.report.names import FLAGS, label, readable_value, unit_of
from assistant.report.results import bias_table, per_height_table, render_block, render_table, results_block

_MAX_LISTED = 16  # arrays up to this many values are written out in full


def std_name(name: str, names: Mapping[str, object]) -> str | None:
    """The uncertainty that goes with ``name``: ``k_n_per_m`` -> ``k_std_n_per_m``, ``q`` -> ``q_std``."""
    tokens = name.split("_")
    candidates = [f"{name}_std"] + ["_".join(tokens[:-n] + ["std"] + tokens[-n:]) for n in (1, 2, 3)
                                    if len(tokens) > n]
    return next((c for c in candidates if c in names and c != name), None)


def _unit(name: str, units: Mapping[str, str]) -> str:
    return units.get(name) or unit_of(name)


def scalar_table(scalars: Mapping[str, object], units: Mapping[str, str] | None = None) -> list[str]:
    """``| quantity | value |`` rows: readable name, value with unit and ``±``."""
    units = units or {}
    paired = {s for n in scalars if (s := std_name(n, scalars))}
    rows = []
    for name, value in scalars.items():
        if name in paired:
            continue
        std_key = std_name(name, scalars)
        std = scalars.get(std_key) if std_key else None
        shown = readable_value(name, value, std, unit=None if name in FLAGS else _unit(name, units))
        rows.append(f"| {label(name)} | {shown} |")
    return ["| quantity | value |", "|---|---|"] + rows if rows else []


def array_lines(arrays: Mapping[str, np.ndarray], units: Mapping[str, str] | None = None) -> list[str]:
    """One line per array: short ones in full (the unit once), long ones as their count and range."""
    units = units or {}
    lines = []
    paired = {s for n in arrays if (s := std_name(n, arrays))}
    for name, values in arrays.items():
        if name in paired:
            continue
        unit = _unit(name, units)
        v = np.asarray(values, dtype=np.float64)
        std_key = std_name(name, arrays)
        std = np.asarray(arrays[std_key], dtype=np.float64) if std_key else None
        if name in FLAGS:
            text = ", ".join(yes_no(x) for x in v.ravel())
        elif v.size <= _MAX_LISTED:
            if std is not None and std.shape == v.shape:
                text = ", ".join(quantity(a, unit, b) for a, b in zip(v.ravel(), std.ravel()))
            else:
                text = number_list(v.ravel(), unit)
        else:
            finite = v[np.isfinite(v)]
            text = (f"{v.size} values from {quantity(finite.min(), unit)} to {quantity(finite.max(), unit)}"
                    if finite.size else f"{v.size} values, none finite")
        lines.append(f"- {label(name)}: {text}")
    return lines


def record_section(title: str, scalars: Mapping[str, object], arrays: Mapping[str, np.ndarray],
                   units: Mapping[str, str] | None = None) -> list[str]:
    out = [f"### {title}", ""]
    out += scalar_table({k: v for k, v in scalars.items() if k != "auxiliary_signals"}, units)
    listed = array_lines(arrays, units)
    if listed:
        out += ["", "Arrays:", ""] + listed
    return out + [""]


# ---- series ---------------------------------------------------------------------------------------------------
def series_section(data, topography_nm: np.ndarray | None) -> list[str]:
    from assistant.storage.resume import resumed_sentence

    heights = number_list([round(h * 1e9, 6) for h in data.heights_m], "nm")
    biases = "none (every second pass at one bias)" if data.biases_v is None else number_list(data.biases_v, "V")
    status = "finished" if data.finished else "partial"
    out = [f"### Series {data.name}", "",
           f"- lift heights: {heights}", f"- tip biases: {biases}",
           f"- completed lines: {data.completed_lines} of {data.lines} ({status})",
           f"- frame: {quantity(data.scan_size_m, 'm')} square, {data.pixels} pixels × {data.lines} lines, "
           f"line rate {quantity(data.line_rate_hz, 'Hz')}, order {data.order}",
           f"- first height repeated after its passes in each line: {yes_no(data.repeat_first)}"]
    seams = resumed_sentence(getattr(data, "resumed_at_lines", ()), data.lines)
    out += ([f"- {seams}"] if seams else []) + [""]
    if data.completed_lines == 0:
        return out + ["No completed lines.", ""]
    if topography_nm is not None:
        finite = topography_nm[np.isfinite(topography_nm)]
        if finite.size:
            out += [f"Topography after plane removal: rms {quantity(np.std(finite), 'nm')}, range "
                    f"{quantity(finite.min(), 'nm')} to {quantity(finite.max(), 'nm')}.", ""]
    out += ["Phase over the completed lines (°):", "",
            "| lift (nm) | bias (V) | mean | rms about mean | min | max | pixels without data |",
            "|---|---|---|---|---|---|---|"]
    phase = data.phase_deg if data.biases_v is not None else data.phase_deg[:, None]
    bias_labels = [DASH] if data.biases_v is None else [number(b) for b in data.biases_v]
    for i, h in enumerate(data.heights_m):
        for j, b in enumerate(bias_labels):
            out.append(stats_row(number(h * 1e9), b, phase[i, j]))
    if data.repeat_phase_deg is not None:
        out.append(stats_row(f"{number(data.heights_m[0] * 1e9)} (repeat)", DASH, data.repeat_phase_deg))
    return out + [""]


def stats_row(lift: str, bias: str, image: np.ndarray) -> str:
    v = image[np.isfinite(image)]
    nan = int(image.size - v.size)
    if not v.size:
        return f"| {lift} | {bias} | {DASH} | {DASH} | {DASH} | {DASH} | {nan} |"
    return (f"| {lift} | {bias} | {number(v.mean())} | {number(v.std())} | {number(v.min())} | {number(v.max())} "
            f"| {nan} |")


def settings_appendix(data) -> list[str]:
    return [f"### Series {data.name}: settings as stored (for a resume)", "", "```json",
            json.dumps(json.loads(data.settings_json), indent=1, sort_keys=True), "```", ""]


# ---- analysis -------------------------------------------------------------------------------------------------
_IN_TABLES = {"heights_nm", "magnetic_rms_deg", "magnetic_rms_std_deg", "short_range_mean_deg",
              "short_range_mean_std_deg", "electrostatic_mean_deg", "electrostatic_mean_std_deg", "residual_rms_deg",
              "noise_deg", "residual_at_noise"}
_IN_RESULTS = {"recommended_lift_nm", "recommended_bias_v", "cpd_v", "cpd_std_v", "cpd_sentence", "noise_sentence",
               "tip_changed_sample", "interaction_evidence"}


def analysis_section(name: str, d: Mapping[str, object], biases_v=None) -> list[str]:
    """The decomposition of one series: per-height table, bias table, then every other stored number."""
    out = [f"### Decomposition of {name}", ""]
    headers, rows, notes = per_height_table(dict(d))
    shown = _IN_TABLES if rows else set()
    if rows:
        out += render_table(headers, rows, markdown=True) + [""] + notes + ([""] if notes else [])
    grid = bias_table(dict(d), biases_v)
    if grid is not None:
        out += ["Electrostatic mean (°) at each tip bias:", ""] + render_table(*grid, markdown=True) + [""]
    scalars = {k: v for k, v in d.items() if k not in shown | _IN_RESULTS and np.ndim(v) == 0}
    arrays = {k: np.asarray(v) for k, v in d.items() if k not in shown and np.ndim(v) > 0}
    out += scalar_table(scalars)
    listed = array_lines(arrays)
    if listed:
        out += ["", "Further numbers per lift height:", ""] + listed
    return out + [""]


def results_section(analyses: list[tuple[str, Mapping[str, object]]], calibration: Mapping[str, object] | None
                    ) -> list[str]:
    out = ["## Results", ""]
    for name, d in analyses:
        if len(analyses) > 1:
            out += [f"Series {name}:", ""]
        out += render_block(results_block(dict(d)), markdown=True) + [""]
    if not analyses:
        out += ["- **Decomposition:** none stored in this session file", ""]
    if calibration:
        g = calibration.get
        parts = [f"spring constant k {readable_value('k_n_per_m', g('k_n_per_m'), g('k_std_n_per_m'))}"
                 + (f" ({g('k_source')})" if g("k_source") else "")]
        if g("invols_nm_per_v") is not None:
            parts.append("optical-lever sensitivity (InvOLS) "
                         + readable_value("invols_nm_per_v", g("invols_nm_per_v"), g("invols_std_nm_per_v")))
        if g("f0_hz") is not None:
            parts.append(f"resonance f0 {quantity(g('f0_hz'), 'Hz', g('f0_std_hz'))}")
        if g("q") is not None:
            parts.append(f"Q {number(g('q'), g('q_std'))}")
        out += ["- **Calibration:** " + ", ".join(parts), ""]
    return out


# ---- figures --------------------------------------------------------------------------------------------------
def caption(file_name: str, *, per_height_scale: bool) -> str:
    """What a figure of the report shows, in a sentence."""
    scale = ("each lift height on its own colour scale (compare shapes, not contrast, between heights)"
             if per_height_scale else "every lift height on one colour scale centred on zero")
    stem = file_name.rsplit("/", 1)[-1].removesuffix(".png")
    if stem == "thermal":
        return "thermal spectrum of the free lever with the fitted oscillator; zoom on the fit window (kHz); residuals"
    if stem == "sweep":
        return "drive sweep: amplitude and phase with the fitted driven oscillator"
    if stem.endswith("_topography"):
        return "topography (first pass), plane removed"
    if "_phase" in stem:
        return f"second-pass phase, {scale}; dark = attractive"
    if stem.endswith("_second_passes"):
        return ("every second pass (each lift height and tip bias) on one phase scale centred on zero, the repeat "
                "of the first height, repeat minus first pass, and the second-pass amplitude")
    if stem.endswith("_bias_parabola"):
        return "image-mean phase against tip bias with the fitted parabola; its vertex is V_cpd"
    if stem == "decomposition_mean":
        return "image-mean phase against lift height with the fitted electrostatic and short-range parts; " \
               "the recommended lift is marked"
    if stem == "decomposition_magnetic":
        return "magnetic rms, noise and residual against lift height; shortest resolved period"
    if stem == "decomposition_maps":
        return f"magnetic maps at three heights ({scale}), the residual, and the change map of the repeat"
    if stem.endswith("media_transition_map"):
        return "the image the media section read, with each track's written edges (dashed), its bit-cell grid (grey " \
               "ticks) and every transition coloured by its deviation from that grid"
    if stem.endswith("media_jitter_histogram"):
        return "deviations of the transitions from their tracks' bit-cell grids, with the normal density of the jitter"
    if stem.endswith("_loop"):
        return "field series: net moment of the elements against the field, and their switching fields"
    if stem.endswith("_elements"):
        return "field series: each element coloured by its switching field, descending and ascending branch"
    if stem.endswith("_field_steps"):
        return "field series: phase over the field steps on one colour scale; dark = attractive"
    if stem.startswith("field_map"):
        return "stray field μ0 Hz (red: pointing away from the sample) and its standard uncertainty; edge margin dashed"
    if stem == "ttf":
        return "tip transfer function against spatial period with its uncertainty, valid band and point-probe fit"
    return ""


def unit_written(unit: str) -> str:
    return unit_text(unit)
