"""Figures of a series of one or two lift heights (no decomposition), matplotlib object API on the Agg canvas.

* ``imaging_overview_figure``: every second-pass phase image (each height, each bias) on one scale centred on
  zero, the repeat of the first height, the repeat minus the first pass with the changed regions outlined, and
  the second-pass amplitude at each height;
* ``bias_parabola_figure``: the image mean against the tip bias with the fitted parabola and V_cpd.

The titles carry the plain sentences of the analysis (noise against the thermal limit, V_cpd, tip change).
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import Normalize
from matplotlib.figure import Figure

from assistant.analysis.imaging import ImagingAnalysis
from assistant.report.colours import symmetric_limit
from assistant.report.images import phase_colormap, save_png

__all__ = ["imaging_overview_figure", "bias_parabola_figure", "write_imaging_figures"]


def _new_figure(size: tuple[float, float]) -> Figure:
    fig = Figure(figsize=size, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _padded(image: np.ndarray, lines: int) -> np.ndarray:
    out = np.full((lines, image.shape[-1]), np.nan)
    out[: image.shape[0]] = image
    return out


def imaging_overview_figure(data, a: ImagingAnalysis) -> Figure:
    """Phase per height and bias on one scale, the repeat check, and the second-pass amplitude.

    ``data`` is the stored series (``SeriesData``): phase (H, [B,] L, P), amplitude, repeat.
    """
    phase = np.asarray(data.phase_deg, float)
    amp = np.asarray(data.amplitude_v, float)
    if data.biases_v is None:
        phase, amp = phase[:, None], amp[:, None]
    nh, nb = phase.shape[:2]
    size = data.scan_size_m * 1e6
    extent = (0.0, size, 0.0, size)
    panels = [(_padded(phase[i, j], data.lines), f"lift {h * 1e9:.4g} nm"
               + ("" if data.biases_v is None else f", {data.biases_v[j]:+.3g} V"))
              for i, h in enumerate(data.heights_m) for j in range(nb)]
    first_bias = "" if data.biases_v is None else f", {data.biases_v[0]:+.3g} V"
    repeat = None if data.repeat_phase_deg is None else _padded(data.repeat_phase_deg, data.lines)
    # one row per height, one column per bias; below: the repeat, repeat - first, the amplitude per height
    checks = (0 if repeat is None else 1) + (0 if a.tip_change is None else 1) + nh
    grid_rows, grid_cols = (nh, nb) if nb > 1 else (1, nh)  # without a bias grid the heights side by side
    cols = max(grid_cols, min(checks, 4), 2)
    check_rows = int(np.ceil(checks / cols))
    fig = _new_figure((2.9 * cols + 1.6, 2.9 * (grid_rows + check_rows) + 1.0))
    top, bottom = fig.subfigures(2, 1, height_ratios=[grid_rows, check_rows])
    axes = top.subplots(grid_rows, cols, squeeze=False)
    limit = symmetric_limit([p for p, _ in panels] + ([] if repeat is None else [repeat]))
    norm = Normalize(-limit, limit)
    cmap = phase_colormap()
    im = None
    for k, (img, title) in enumerate(panels):
        ax = axes[k // grid_cols, k % grid_cols]
        im = ax.imshow(img, origin="lower", extent=extent, cmap=cmap, norm=norm, interpolation="nearest")
        ax.set_title(title, fontsize=9)
    for ax in axes[:, grid_cols:].ravel():
        ax.set_axis_off()
    top.colorbar(im, ax=axes.ravel().tolist(), label="phase (deg), dark = attractive", extend="both", shrink=0.9)
    lower_axes = bottom.subplots(check_rows, cols, squeeze=False)
    lower = list(lower_axes.ravel())
    if repeat is not None:
        ax = lower.pop(0)
        ax.imshow(repeat, origin="lower", extent=extent, cmap=cmap, norm=norm, interpolation="nearest")
        ax.set_title(f"lift {data.heights_m[0] * 1e9:.4g} nm{first_bias}, repeat", fontsize=9)
    if a.tip_change is not None:
        ax = lower.pop(0)
        diff = _padded(a.tip_change.difference_deg, data.lines)
        lim = symmetric_limit(diff)
        dim = ax.imshow(diff, origin="lower", extent=extent, cmap=cmap, norm=Normalize(-lim, lim),
                        interpolation="nearest")
        changed = _padded(a.tip_change.changed.astype(float), data.lines)
        if np.nanmax(changed) > 0:
            ax.contour(np.nan_to_num(changed), levels=[0.5], colors="tab:red", linewidths=1.0, origin="lower",
                       extent=extent)
        ax.set_title(f"repeat - first ({a.tip_change.changed_fraction:.1%} changed)", fontsize=9)
        bottom.colorbar(dim, ax=ax, label="phase change (deg)", shrink=0.85)
    amp_mv = [_padded(amp[i, 0], data.lines) * 1e3 for i in range(nh)]
    finite = np.concatenate([x[np.isfinite(x)] for x in amp_mv])
    lo, hi = (np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0))
    if hi <= lo:
        lo, hi = lo - 0.5, hi + 0.5
    for i, img in enumerate(amp_mv):
        ax = lower.pop(0)
        aim = ax.imshow(img, origin="lower", extent=extent, cmap=colormaps["cividis"], norm=Normalize(lo, hi),
                        interpolation="nearest")
        ax.set_title(f"amplitude, lift {data.heights_m[i] * 1e9:.4g} nm{first_bias}", fontsize=9)
        bottom.colorbar(aim, ax=ax, label="amplitude (mV)", shrink=0.85)
    for ax in lower:
        ax.set_axis_off()
    for ax in [*axes.ravel(), *lower_axes.ravel()]:
        if ax.axison:
            ax.set_xlabel("x (µm)", fontsize=8)
            ax.set_ylabel("y (µm)", fontsize=8)
            ax.set_aspect("equal")
    status = f"{data.completed_lines} of {data.lines} lines"
    text = a.noise.sentence + ("" if a.tip_change is None else " " + a.tip_change.sentence)
    fig.suptitle(f"{data.name}: second passes, {status}\n" + textwrap.fill(text, 110), fontsize=9)
    return fig


def bias_parabola_figure(a: ImagingAnalysis) -> Figure:
    """Image mean (deg) against tip bias (V) at each height, the fitted common-vertex parabola and V_cpd."""
    p = a.parabola
    if p is None or a.bias_v is None:
        raise ValueError("the analysis has no bias grid")
    fig = _new_figure((6.2, 4.6))
    ax = fig.subplots()
    for i, h in enumerate(a.heights_nm):
        colour = f"C{i}"
        ax.errorbar(a.bias_v, a.image_mean_deg[i], yerr=a.image_mean_std_deg[i], fmt="o", ms=4, capsize=2,
                    color=colour, label=f"image mean, lift {h:.4g} nm")
        ax.plot(a.parabola_bias_v, a.parabola_deg[i], "-", color=colour, linewidth=1,
                label="parabola, common vertex" if i == 0 else None)
    if p.cpd_v is not None:
        ax.axvline(p.cpd_v, color="0.2", linestyle="--", linewidth=1, label=f"V_cpd = {p.cpd_v:.4g} V")
        ax.axvspan(p.cpd_v - p.cpd_std_v, p.cpd_v + p.cpd_std_v, color="0.5", alpha=0.25, linewidth=0)
    ax.set_xlabel("tip bias (V)")
    ax.set_ylabel("image-mean phase (deg), negative = attractive")
    ax.legend(fontsize=8)
    ax.set_title(textwrap.fill(p.sentence, 80), fontsize=9)
    return fig


def write_imaging_figures(a: ImagingAnalysis, data, directory: str | Path, *, dpi: int = 120) -> list[Path]:
    """Write the overview and, with a bias grid, the bias parabola as PNG into ``directory``."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    paths = [save_png(imaging_overview_figure(data, a), d / f"{data.name}_second_passes.png", dpi=dpi)]
    if a.parabola is not None:
        paths.append(save_png(bias_parabola_figure(a), d / f"{data.name}_bias_parabola.png", dpi=dpi))
    return paths
