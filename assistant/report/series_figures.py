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
from assistant.report.panel_grid import fixed_margins, panels_with_bars
from assistant.report.results import parts_together_deg

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


def _whole(std, model_std):
    """Noise and model uncertainty in quadrature (the model part may be missing)."""
    return std if model_std is None else np.hypot(std, model_std)


def mean_figure(a: SeriesAnalysis) -> Figure:
    """Image-mean phase (deg) against lift height (nm) with the fitted parts and 1-sigma bands, the recommended lift
    marked, and a panel of the misfit (measured minus fit) with the measured error bars at their own scale (on the
    main panel they are smaller than the markers)."""
    fig = _new_figure((7.6, 8.0))
    ax, ax_res, note = fig.subplots(3, 1, height_ratios=[4.0, 1.6, 1.8])
    h = a.heights_nm
    # the parts' bands: noise and model uncertainty together (the split depends on the tip)
    es, es_sd = a.electrostatic_mean_deg, _whole(a.electrostatic_mean_std_deg, a.electrostatic_mean_model_std_deg)
    sr, sr_sd = a.short_range_mean_deg, _whole(a.short_range_mean_std_deg, a.short_range_mean_model_std_deg)
    if es.ndim == 1:
        # the parts add up to the measured total; the tip models' own fit shows how well they describe it
        fit = parts_together_deg(a.signal_space, es, sr) if a.mean_model_fit_deg is None else a.mean_model_fit_deg
        ax.plot(h, fit, "-", color="0.2", lw=1.6, zorder=3, label="tip-model fit (averaged over tips)")
        ax.errorbar(h, a.mean_phase_deg, yerr=a.mean_phase_std_deg, fmt="o", mfc="none", color="k", ms=6,
                    capsize=3, zorder=4, label="measured image mean (±1σ)")
        ax.plot(h, es, "-", color="tab:blue", label="electrostatic (±1σ with model)")
        ax.fill_between(h, es - es_sd, es + es_sd, color="tab:blue", alpha=0.25, linewidth=0)
        ax_res.errorbar(h, a.mean_phase_deg - fit, yerr=a.mean_phase_std_deg, fmt="o", mfc="none",
                        color="k", ms=4, capsize=3)
    else:
        colours = [f"C{i}" for i in range(es.shape[1])]
        model = parts_together_deg(a.signal_space, es, sr[:, None])
        for b, volts in enumerate(a.bias_v):
            ax.plot(h, model[:, b], "-", color=colours[b], lw=1.4, zorder=3)
            ax.errorbar(h, a.mean_phase_deg[:, b], yerr=a.mean_phase_std_deg[:, b], fmt="o", mfc="none", ms=6,
                        capsize=3, color=colours[b], zorder=4, label=f"measured at {volts:+.3g} V (±1σ)")
            ax.fill_between(h, es[:, b] - es_sd[:, b], es[:, b] + es_sd[:, b], color=colours[b], alpha=0.15,
                            linewidth=0)
            ax_res.errorbar(h * (1 + 0.01 * (b - (len(a.bias_v) - 1) / 2)),  # side by side, not on top
                            a.mean_phase_deg[:, b] - model[:, b], yerr=a.mean_phase_std_deg[:, b], fmt="o",
                            mfc="none", ms=4, capsize=3, color=colours[b])
        ax.plot([], [], "-", color="0.3", label="fit: a(h) (V − V_cpd)² + short-range")
    ax.plot(h, sr, "--", color="tab:red", label="short-range (±1σ with model)")
    ax.fill_between(h, sr - sr_sd, sr + sr_sd, color="tab:red", alpha=0.25, linewidth=0)
    ax.axhline(0.0, color="0.6", linewidth=0.8)
    ax_res.axhline(0.0, color="0.6", linewidth=0.8)
    lift = a.recommendation.lift_height_m
    for axis in (ax, ax_res):
        if lift is not None:
            axis.axvline(lift * 1e9, color="tab:green", linestyle=":", lw=1.5)
        axis.set_xlabel("lift height (nm)")
    if lift is not None:
        ax.plot([], [], ":", color="tab:green", lw=1.5, label=f"recommended lift {lift * 1e9:.4g} nm")
    ax.set_ylabel("image-mean phase (deg)\nnegative = attractive")
    ax_res.set_ylabel("measured − model (deg)")
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)  # beside, not on data
    text = a.recommendation.sentence + " " + a.separability_sentence
    note.set_axis_off()
    note.text(0.0, 1.0, textwrap.fill(text, 110), transform=note.transAxes, va="top", ha="left", fontsize=7.5,
              bbox={"boxstyle": "round", "facecolor": "white", "edgecolor": "0.6"})
    fig.suptitle(recommendation_title(a))
    return fig


def magnetic_figure(a: SeriesAnalysis) -> Figure:
    """Magnetic rms (deg) and shortest resolved period (nm) against lift height (nm)."""
    fig = Figure(figsize=(6.4, 6.0))  # fixed margins (.panel_grid): no layout pass
    FigureCanvasAgg(fig)
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    fixed_margins(fig, left=0.9, top=0.45, hspace=0.2)
    h = a.heights_nm
    ax.errorbar(h, a.magnetic_rms_deg, yerr=a.magnetic_rms_std_deg, fmt="o-", color="k", ms=4, capsize=2,
                label="magnetic rms (joint fit" + (", interior)" if a.edge == "reflect" else ")"))
    ax.plot(h, a.noise_deg, "s:", color="tab:gray", ms=3, label="noise per pixel")
    ax.plot(h, a.residual_rms_deg, "^:", color="tab:orange", ms=3, label="continuation residual rms")
    # the residual is judged against what the noise alone leaves after the fit, which at a height the fit leans
    # on (the lowest) is well below the noise per pixel: drawn, so that a flagged height reads as it is judged
    ax.plot(h, a.expected_residual_rms_deg, "v--", color="tab:orange", ms=3, alpha=0.6,
            label="residual that noise alone leaves")
    bad = ~np.asarray(a.residual_at_noise, bool)
    if bad.any():
        ax.plot(h[bad], a.residual_rms_deg[bad], "x", color="tab:red", ms=8,
                label="residual above what noise leaves")
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


def _map_panel(fig, ax, image, *, size_um, title, cmap, limit, label, cax=None):
    """One phase map on a scale centred on zero from -limit to +limit (deg); its colour bar in ``cax`` if given."""
    im = ax.imshow(image, origin="lower", extent=(0, size_um[1], 0, size_um[0]), cmap=cmap,
                   norm=Normalize(-limit, limit), interpolation="nearest")
    ax.set_title(title, fontsize=9)
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")
    if cax is None:
        fig.colorbar(im, ax=ax, label=label, shrink=0.85)
    else:
        fig.colorbar(im, cax=cax, label=label)


def maps_figure(a: SeriesAnalysis, *, per_height_scale: bool = False) -> Figure:
    """Magnetic maps (deg) at three heights, the residual at the lowest height, the change map if any and, with a
    bias grid, the contact-potential map (mV about V_cpd); a dashed frame marks the interior that the residual
    (and, reflected-edge fit, the magnetic rms) is judged on.

    The magnetic maps share one colour scale unless ``per_height_scale``, which gives each its own (the title says
    which). The change map is drawn only where the repeat changed beyond noise; otherwise the title says "no
    change"."""
    n = len(a.heights_m)
    picks = sorted({0, n // 2, n - 1})
    phase = phase_colormap()  # every panel but the contact potential's is a phase
    panels = [(a.magnetic_deg[i], f"magnetic, lift {a.heights_nm[i]:.4g} nm", "magnetic phase (deg)", phase)
              for i in picks]
    panels.append((a.residual_deg[0], f"residual, lift {a.heights_nm[0]:.4g} nm", "residual phase (deg)", phase))
    changed = a.tip_change is not None and bool(np.any(a.tip_change.changed))
    if a.tip_change is not None:
        verdict = (f"{a.tip_change.changed_fraction:.2%} changed beyond noise" if changed else
                   "no change beyond noise")
        panels.append((a.tip_change.difference_deg, f"repeat − first pass: {verdict}", "phase change (deg)", phase))
    if a.cpd_map_v is not None:  # a bias grid: the contact potential under the tip, whose contrast was taken out
        noise = f", noise {a.cpd_map_std_v * 1e3:.2g} mV per px" if a.cpd_map_std_v else ""
        # without V_cpd (beyond the reach of the biases) the map is drawn about its own mean
        ref = a.cpd_v if a.cpd_v is not None else float(np.nanmean(a.cpd_map_v))
        about = f"− {a.cpd_v:.4g} V" if a.cpd_v is not None else "− its mean"  # as long: the title fits its panel
        panels.append(((a.cpd_map_v - ref) * 1e3, f"contact potential {about}{noise}",
                       "contact potential (mV)", "RdBu_r"))  # not a phase: a plain diverging scale
    cols = 3
    rows = int(np.ceil((len(panels) + changed) / cols))
    fig = Figure(figsize=(4.0 * cols, 3.4 * rows + 0.5))  # axes at fixed margins: no layout pass (.panel_grid)
    FigureCanvasAgg(fig)
    axes, bars = panels_with_bars(fig, rows, cols, title_lines=2)
    r, c = a.magnetic_deg.shape[-2:]
    size_um = (r * a.pixel_m[0] * 1e6, c * a.pixel_m[1] * 1e6)
    mag_limit = max(symmetric_limit(p[0]) for p in panels[:len(picks)])
    b = a.edge_band_px
    for k, (img, title, label, cmap) in enumerate(panels):
        lim = (symmetric_limit(img) if per_height_scale else mag_limit) if k < len(picks) else symmetric_limit(img)
        _map_panel(fig, axes[k], img, size_um=size_um, title=title, cmap=cmap, limit=lim, label=label, cax=bars[k])
        if b and k <= len(picks):  # the interior over which the magnetic rms and the residual are judged
            y0, x0 = b * a.pixel_m[0] * 1e6, b * a.pixel_m[1] * 1e6
            axes[k].add_patch(Rectangle((x0, y0), size_um[1] - 2 * x0, size_um[0] - 2 * y0, fill=False,
                                        edgecolor="0.35", linestyle="--", linewidth=0.8))
    used = len(panels)
    if changed:
        ax = axes[used]
        flag = ListedColormap([(0.92, 0.92, 0.92), (0.75, 0.1, 0.1)])
        ax.imshow(a.tip_change.changed.astype(float), origin="lower", extent=(0, size_um[1], 0, size_um[0]),
                  cmap=flag, vmin=0, vmax=1, interpolation="nearest")
        ax.set_title(f"changed beyond noise ({a.tip_change.changed_fraction:.2%})", fontsize=9)
        ax.set_xlabel("x (µm)")
        ax.set_ylabel("y (µm)")
        bars[used].set_axis_off()  # two colours named in the title: no colour bar
        used += 1
    for ax in [*axes[used:], *bars[used:]]:
        ax.set_axis_off()
    scale = ("each magnetic map on its own colour scale" if per_height_scale else
             "magnetic maps on one shared colour scale")
    fig.suptitle(recommendation_title(a) + f"\ndark = attractive (negative); {scale}")
    return fig


def series_figures(a: SeriesAnalysis, *, per_height_scale: bool = False) -> dict[str, Figure]:
    """All decomposition figures by file stem."""
    return {"decomposition_mean": mean_figure(a), "decomposition_magnetic": magnetic_figure(a),
            "decomposition_maps": maps_figure(a, per_height_scale=per_height_scale)}


def write_series_figures(a: SeriesAnalysis, directory: str | Path, *, dpi: int = 120,
                         per_height_scale: bool = False) -> list[Path]:
    """Write every figure of :func:`series_figures` as PNG into ``directory``; returns the paths."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    return [save_png(fig, d / f"{stem}.png", dpi=dpi)
            for stem, fig in series_figures(a, per_height_scale=per_height_scale).items()]
