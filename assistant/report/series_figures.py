"""Figures of a lift-height decomposition (matplotlib object API on the Agg canvas, no pyplot state).

* ``mean_figure``: image-mean phase against lift height with the fitted electrostatic and short-range parts
  and their one-standard-error bands;
* ``magnetic_figure``: magnetic rms against height with its error bars, the noise of each height and the
  shortest resolved period;
* ``maps_figure``: the denoised magnetic image at the lowest, middle and highest height, the continuation
  residual at the lowest height and, with a repeated first pass, the change map. Phase maps use the project's
  CIELAB diverging map (dark = negative = attractive, neutral grey at zero) on a scale centred on zero.

The recommendation is in every figure's title and in a text box of the mean figure.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import ListedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle

from assistant.analysis.lift_series import SeriesAnalysis
from assistant.report.colours import symmetric_limit
from assistant.report.images import phase_colormap, save_png

__all__ = ["mean_figure", "magnetic_figure", "maps_figure", "series_figures", "write_series_figures",
           "recommendation_title"]


def _new_figure(size: tuple[float, float]) -> Figure:
    fig = Figure(figsize=size, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def recommendation_title(a: SeriesAnalysis) -> str:
    rec = a.recommendation
    lift = "no lift height qualifies" if rec.lift_height_m is None else f"lift {rec.lift_height_m * 1e9:.4g} nm"
    bias = "" if rec.bias_v is None else f", bias {rec.bias_v:.3g} V (V_cpd)"
    return f"Recommended: {lift}{bias}"


def mean_figure(a: SeriesAnalysis) -> Figure:
    """Image-mean phase (deg) against lift height (nm) with the fitted parts and 1-sigma bands."""
    fig = _new_figure((6.4, 6.0))
    ax, note = fig.subplots(2, 1, height_ratios=[4.2, 1.0])
    h = a.heights_nm
    es, es_sd = a.electrostatic_mean_deg, a.electrostatic_mean_std_deg
    sr, sr_sd = a.short_range_mean_deg, a.short_range_mean_std_deg
    if es.ndim == 1:
        ax.errorbar(h, a.mean_phase_deg, yerr=a.mean_phase_std_deg, fmt="o", color="k", ms=4,
                    label="measured image mean")
        ax.plot(h, es + sr, "-", color="0.3", label="fit: electrostatic + short-range")
        ax.plot(h, es, "-", color="tab:blue", label="electrostatic")
        ax.fill_between(h, es - es_sd, es + es_sd, color="tab:blue", alpha=0.25, linewidth=0)
    else:
        colours = [f"C{i}" for i in range(es.shape[1])]
        for b, volts in enumerate(a.bias_v):
            ax.errorbar(h, a.mean_phase_deg[:, b], yerr=a.mean_phase_std_deg[:, b], fmt="o", ms=4,
                        color=colours[b], label=f"measured, {volts:+.3g} V")
            ax.plot(h, es[:, b] + sr, "-", color=colours[b], linewidth=1)
            ax.fill_between(h, es[:, b] - es_sd[:, b], es[:, b] + es_sd[:, b], color=colours[b], alpha=0.15,
                            linewidth=0)
        ax.plot([], [], "-", color="0.3", label="fit: a(h) (V - V_cpd)^2 + short-range")
    ax.plot(h, sr, "--", color="tab:red", label="short-range")
    ax.fill_between(h, sr - sr_sd, sr + sr_sd, color="tab:red", alpha=0.25, linewidth=0)
    ax.axhline(0.0, color="0.6", linewidth=0.8)
    ax.set_xlabel("lift height (nm)")
    ax.set_ylabel("image-mean phase (deg), negative = attractive")
    ax.legend(fontsize=8, loc="lower right")
    text = a.recommendation.sentence + " " + a.separability_sentence
    note.set_axis_off()
    note.text(0.0, 1.0, textwrap.fill(text, 95), transform=note.transAxes, va="top", ha="left", fontsize=7.5,
              bbox={"boxstyle": "round", "facecolor": "white", "edgecolor": "0.6"})
    fig.suptitle(recommendation_title(a))
    return fig


def magnetic_figure(a: SeriesAnalysis) -> Figure:
    """Magnetic rms (deg) and shortest resolved period (nm) against lift height (nm)."""
    fig = _new_figure((6.4, 6.0))
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    h = a.heights_nm
    ax.errorbar(h, a.magnetic_rms_deg, yerr=a.magnetic_rms_std_deg, fmt="o-", color="k", ms=4, capsize=2,
                label="magnetic rms (joint fit" + (", interior)" if a.edge == "reflect" else ")"))
    ax.plot(h, a.noise_deg, "s:", color="tab:gray", ms=3, label="noise per pixel")
    ax.plot(h, a.residual_rms_deg, "^:", color="tab:orange", ms=3, label="continuation residual rms")
    bad = ~np.asarray(a.residual_at_noise, bool)
    if bad.any():
        ax.plot(h[bad], a.residual_rms_deg[bad], "x", color="tab:red", ms=8, label="residual above noise")
    if a.recommendation.lift_height_m is not None:
        ax.axvline(a.recommendation.lift_height_m * 1e9, color="tab:green", linestyle="--", label="recommended")
        ax2.axvline(a.recommendation.lift_height_m * 1e9, color="tab:green", linestyle="--")
    ax.set_yscale("log")
    ax.set_ylabel("phase (deg)")
    ax.legend(fontsize=8)
    per = np.where(np.isfinite(a.resolution_period_m), a.resolution_period_m * 1e9, np.nan)
    ax2.plot(h, per, "o-", color="tab:purple", ms=4)
    ax2.set_ylabel("shortest resolved period (nm)")
    ax2.set_xlabel("lift height (nm)")
    fig.suptitle(recommendation_title(a))
    return fig


def _map_panel(fig, ax, image, *, size_um, title, cmap, limit, label):
    im = ax.imshow(image, origin="lower", extent=(0, size_um[1], 0, size_um[0]), cmap=cmap,
                   norm=Normalize(-limit, limit), interpolation="nearest")
    ax.set_title(title, fontsize=9)
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")
    fig.colorbar(im, ax=ax, label=label, shrink=0.85)


def maps_figure(a: SeriesAnalysis) -> Figure:
    """Magnetic maps (deg) at three heights, the residual at the lowest height and the change map if any; a
    dashed frame marks the interior that the residual (and, reflected-edge fit, the magnetic rms) is judged on."""
    n = len(a.heights_m)
    picks = sorted({0, n // 2, n - 1})
    panels = [(a.magnetic_deg[i], f"magnetic, lift {a.heights_nm[i]:.4g} nm", "magnetic phase (deg)")
              for i in picks]
    panels.append((a.residual_deg[0], f"residual, lift {a.heights_nm[0]:.4g} nm", "residual phase (deg)"))
    if a.tip_change is not None:
        panels.append((a.tip_change.difference_deg, "repeat - first pass", "phase change (deg)"))
    cols = 3
    rows = int(np.ceil((len(panels) + (a.tip_change is not None)) / cols))
    fig = _new_figure((4.0 * cols, 3.4 * rows + 0.5))
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    r, c = a.magnetic_deg.shape[-2:]
    size_um = (r * a.pixel_m[0] * 1e6, c * a.pixel_m[1] * 1e6)
    cmap = phase_colormap()
    mag_limit = max(symmetric_limit(p[0]) for p in panels[:len(picks)])
    b = a.edge_band_px
    for k, (img, title, label) in enumerate(panels):
        lim = mag_limit if k < len(picks) else symmetric_limit(img)
        _map_panel(fig, axes[k], img, size_um=size_um, title=title, cmap=cmap, limit=lim, label=label)
        if b and k <= len(picks):  # the interior over which the magnetic rms and the residual are judged
            y0, x0 = b * a.pixel_m[0] * 1e6, b * a.pixel_m[1] * 1e6
            axes[k].add_patch(Rectangle((x0, y0), size_um[1] - 2 * x0, size_um[0] - 2 * y0, fill=False,
                                        edgecolor="0.35", linestyle="--", linewidth=0.8))
    used = len(panels)
    if a.tip_change is not None:
        ax = axes[used]
        flag = ListedColormap([(0.92, 0.92, 0.92), (0.75, 0.1, 0.1)])
        ax.imshow(a.tip_change.changed.astype(float), origin="lower", extent=(0, size_um[1], 0, size_um[0]),
                  cmap=flag, vmin=0, vmax=1, interpolation="nearest")
        ax.set_title(f"changed beyond noise ({a.tip_change.changed_fraction:.2%})", fontsize=9)
        ax.set_xlabel("x (µm)")
        ax.set_ylabel("y (µm)")
        used += 1
    for ax in axes[used:]:
        ax.set_axis_off()
    fig.suptitle(recommendation_title(a) + "  |  dark = attractive (negative)")
    return fig


def series_figures(a: SeriesAnalysis) -> dict[str, Figure]:
    """All decomposition figures by file stem."""
    return {"decomposition_mean": mean_figure(a), "decomposition_magnetic": magnetic_figure(a),
            "decomposition_maps": maps_figure(a)}


def write_series_figures(a: SeriesAnalysis, directory: str | Path, *, dpi: int = 120) -> list[Path]:
    """Write every figure of :func:`series_figures` as PNG into ``directory``; returns the paths."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    return [save_png(fig, d / f"{stem}.png", dpi=dpi) for stem, fig in series_figures(a).items()]
