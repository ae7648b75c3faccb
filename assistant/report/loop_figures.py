"""Figures of a field series (matplotlib object API on the Agg canvas, no pyplot state).

* ``loop_figure``: the net moment of the elements against the applied field, branch by branch, with the
  loop of non-interacting elements for the fitted Hc and sigma and the tip's reversals marked; below it the
  histogram of the elements' switching fields, each counted between the step before and the first step found
  reversed, with the fitted normal law;
* ``element_map_figure``: the elements where they lie, each coloured by the first field found reversed (descending and
  ascending branch side by side), the elements the tip switched outlined;
* ``strip_figure``: the phase images over the field steps (at most a dozen, the tip's reversals among them)
  on one scale centred on zero, dark = attractive, in the report's diverging phase map.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import Normalize
from matplotlib.figure import Figure

from assistant.analysis.field_series import LoopAnalysis, branches, normal_loop
from assistant.formatting import quantity
from assistant.report.colours import symmetric_limit
from assistant.report.images import phase_colormap, save_png

__all__ = ["loop_figure", "element_map_figure", "strip_figure", "write_loop_figures"]

_DOWN, _UP, _OTHER = "#1f5fa8", "#c2571a", "0.55"  # descending, ascending, other branches


def _new_figure(size: tuple[float, float]) -> Figure:
    fig = Figure(figsize=size, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _title(a: LoopAnalysis) -> str:
    hc = a.coercive_a_per_m
    text = f"{a.count} elements"
    if np.isfinite(hc):
        text += f", Hc = {quantity(hc, 'A/m', a.coercive_std_a_per_m)}"
    if np.isfinite(a.sfd_sigma_a_per_m):
        text += f", σ = {quantity(a.sfd_sigma_a_per_m, 'A/m', a.sfd_sigma_std_a_per_m)}"
    return text


def loop_figure(a: LoopAnalysis) -> Figure:
    """M/Ms against the applied field, and the histogram of the switching fields (kA/m)."""
    fig = _new_figure((6.6, 6.8))
    ax, hist = fig.subplots(2, 1, height_ratios=[3.0, 1.6], sharex=True)
    h = a.field_a_per_m / 1e3
    for b in branches(a.field_a_per_m):
        if a.down is not None and b == a.down.branch:
            colour, label = _DOWN, "descending"
        elif a.up is not None and b == a.up.branch:
            colour, label = _UP, "ascending"
        else:
            colour, label = _OTHER, "recoil / minor"
        seg = slice(b.start, b.end + 1)
        ax.plot(h[seg], a.m_over_ms[seg], "o-", color=colour, ms=3.5, lw=1.2, label=label)
    hc, sigma = a.coercive_a_per_m, a.sfd_sigma_a_per_m
    if np.isfinite(hc) and np.isfinite(sigma) and sigma > 0:
        grid = np.linspace(h.min(), h.max(), 400) * 1e3
        ax.plot(grid / 1e3, normal_loop(grid, hc, sigma, direction=-1), "--", color="0.2", lw=0.9,
                label="non-interacting elements, fitted Hc and σ")
        ax.plot(grid / 1e3, normal_loop(grid, hc, sigma, direction=+1), "--", color="0.2", lw=0.9)
    for i, field in enumerate(a.tip_reversal_fields_a_per_m):
        ax.axvline(field / 1e3, color="#7b3294", ls=":", lw=1.2, label="tip reversal" if i == 0 else None)
    ax.axhline(0.0, color="0.8", lw=0.6, zorder=0)
    ax.set_ylabel("M / Ms (element states)")
    ax.set_ylim(-1.12, 1.12)
    ax.legend(fontsize=8, loc="center")  # the middle of a loop is empty
    ax.set_title(_title(a), fontsize=10)
    step = float(np.median(np.abs(np.diff(h)))) if h.size > 1 else 1.0
    # each element is counted over the interval it switched in, from the step before to the first step found
    # reversed: bins between the fields applied, each element at its interval's middle
    edges = np.unique(h)
    middles = [0.5 * (before + at) / 1e3 for before, at in map(a.switching_interval_a_per_m, ("down", "up"))]
    data = [v[np.isfinite(v)] for v in middles]
    hist.hist(data, bins=edges, color=[_DOWN, _UP], label=["descending", "ascending"], stacked=True)
    if np.isfinite(hc) and np.isfinite(sigma) and sigma > 0:
        grid = np.linspace(h.min(), h.max(), 400)
        n = max(len(data[0]), len(data[1]))
        s_ka = sigma / 1e3
        pdf = n * step / (np.sqrt(2 * np.pi) * s_ka) * np.exp(-0.5 * ((np.abs(grid) - hc / 1e3) / s_ka) ** 2)
        hist.plot(grid, pdf, "-", color="0.2", lw=0.9, label="normal law, fitted")
    hist.set_xlabel("applied field (kA/m), out of plane")
    hist.set_ylabel("elements switched\nbetween two steps")
    hist.legend(fontsize=8)
    return fig


def element_map_figure(a: LoopAnalysis) -> Figure:
    """Each element coloured by its switching field on the descending and the ascending branch (kA/m)."""
    fig = _new_figure((9.0, 4.4))
    axes = fig.subplots(1, 2, sharex=True, sharey=True)
    labels = a.elements.labels
    rows, cols = labels.shape
    pr, pc = a.pixel_m if a.pixel_m is not None else (None, None)
    extent = (0, cols * pc * 1e6, 0, rows * pr * 1e6) if pr else (0, cols, 0, rows)
    unit = "µm" if pr else "px"
    values = {"descending": -a.switching_fields_a_per_m("down") / 1e3,
              "ascending": a.switching_fields_a_per_m("up") / 1e3}
    finite = np.concatenate([v[np.isfinite(v)] for v in values.values()])
    lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    if hi <= lo:
        lo, hi = lo - 1.0, hi + 1.0
    cmap = colormaps["plasma"]
    switched_by_tip = set(a.tip_switched_elements)
    im = None
    for ax, (name, v) in zip(axes, values.items()):
        shown = np.full(labels.shape, np.nan)
        inside = labels > 0
        shown[inside] = v[labels[inside] - 1]
        unswitched = inside & ~np.isfinite(shown)
        # white background, hatched grey for elements without a switching field on the branch
        ax.imshow(np.where(unswitched, 1.0, np.nan), origin="lower", extent=extent, cmap="Greys", vmin=0, vmax=2.5,
                  interpolation="nearest")
        if unswitched.any():
            ax.contourf(np.where(unswitched, 1.0, 0.0), levels=[0.5, 1.5], colors="none", hatches=["////"],
                        origin="lower", extent=extent)
        masked = np.ma.masked_where(~np.isfinite(shown), shown)
        im = ax.imshow(masked, origin="lower", extent=extent, cmap=cmap, norm=Normalize(lo, hi),
                       interpolation="nearest")
        for e in switched_by_tip:
            r, c = a.elements.centroids_px[e]
            x = (c + 0.5) * (pc * 1e6 if pc else 1.0)
            y = (r + 0.5) * (pr * 1e6 if pr else 1.0)
            ax.plot(x, y, "o", mfc="none", mec="#d7191c", ms=14, mew=1.5)
        ax.set_title(f"{name} branch: |first field found reversed|", fontsize=10)
        ax.set_xlabel(f"x ({unit})")
        ax.set_aspect("equal")
    axes[0].set_ylabel(f"y ({unit})")
    note = ("hatched grey: no switching field on the branch (did not switch, or not in sight)"
            + ("; red ring: switched by the tip" if switched_by_tip else ""))
    fig.suptitle(f"Switching field of each element ({note})", fontsize=10)
    fig.colorbar(im, ax=list(axes), label="|first field found reversed| (kA/m); switched since the step before",
                 shrink=0.9)
    return fig


def strip_steps(a: LoopAnalysis, most: int = 12) -> list[int]:
    """At most ``most`` steps evenly over the series, the tip's reversals and their previous steps included."""
    n = a.field_a_per_m.size
    chosen = set(np.linspace(0, n - 1, min(most, n)).round().astype(int).tolist())
    for k in a.tip_reversal_steps:
        chosen |= {k - 1, k}
    keep = sorted(chosen)
    while len(keep) > most + 2 * len(a.tip_reversal_steps):
        keep.pop(len(keep) // 2)
    return keep


def strip_figure(a: LoopAnalysis, phase_deg: np.ndarray, *, most: int = 12) -> Figure:
    """Phase images over the field steps on one scale centred on zero."""
    steps = strip_steps(a, most)
    cols = min(len(steps), 6)
    rows = int(np.ceil(len(steps) / cols))
    fig = _new_figure((1.9 * cols + 1.2, 2.1 * rows + 0.6))
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    images = [np.asarray(phase_deg[k], dtype=float) - np.nanmean(phase_deg[k]) for k in steps]
    limit = symmetric_limit(images)
    rows_px, cols_px = images[0].shape
    pr, pc = a.pixel_m if a.pixel_m is not None else (1.0, 1.0)
    extent = (0.0, cols_px * pc, 0.0, rows_px * pr)  # the frame's true shape, whatever the pixel counts
    im = None
    for ax, k, img in zip(axes, steps, images):
        im = ax.imshow(img, origin="lower", cmap=phase_colormap(), norm=Normalize(-limit, limit),
                       interpolation="nearest", extent=extent)
        ax.set_aspect("equal")
        mark = " tip reversed" if k in a.tip_reversal_steps else ""
        way = "" if k == 0 else (" ↓" if a.field_a_per_m[k] < a.field_a_per_m[k - 1] else " ↑")
        ax.set_title(f"{quantity(a.field_a_per_m[k], 'A/m')}{way}{mark}", fontsize=8,
                     color="#7b3294" if mark else "black")
        ax.set_xticks([])
        ax.set_yticks([])
    for ax in axes[len(steps):]:
        ax.set_axis_off()
    fig.suptitle("Phase over the field steps (image mean removed; dark = attractive)", fontsize=10)
    fig.colorbar(im, ax=list(axes), label="phase (deg)", shrink=0.8, extend="both")
    return fig


def write_loop_figures(a: LoopAnalysis, out_dir: str | Path, *, phase_deg: np.ndarray | None = None,
                       prefix: str = "") -> list[Path]:
    """Write the loop, the element map and (given the phase stack) the image strip as PNG files."""
    out = Path(out_dir)
    paths = [save_png(loop_figure(a), out / f"{prefix}loop.png"),
             save_png(element_map_figure(a), out / f"{prefix}elements.png")]
    if phase_deg is not None:
        paths.append(save_png(strip_figure(a, phase_deg), out / f"{prefix}field_steps.png"))
    return paths
