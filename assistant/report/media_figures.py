"""Figures of the media analysis: the transition map and the jitter histogram (matplotlib object API, Agg).

The transition map shows the phase image on the report's phase scale (dark = attractive) with each track's
written edges (dashed) and every placed transition as a short bar across the track's core, coloured by its
deviation from the track's bit-cell grid on a magenta-green scale that cannot be confused with the phase
colours (the bar spans the rows averaged into the track's profile); thin grey ticks above each track mark its
grid. The histogram pools the deviations the reported jitter was computed from (every track's, off-grid and
outlying transitions left out as there) and draws the normal density of the reported jitter over them.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import Normalize
from matplotlib.figure import Figure

from assistant.formatting import quantity
from assistant.report.colours import symmetric_limit
from assistant.report.images import phase_colormap, save_png

__all__ = ["transition_map_figure", "jitter_histogram_figure", "write_media_figures"]


def _extent_um(shape, pixel_m):
    rows, cols = shape
    return 0.0, cols * pixel_m[1] * 1e6, 0.0, rows * pixel_m[0] * 1e6


def transition_map_figure(phase_deg: np.ndarray, result, *, title: str = "Transition map") -> Figure:
    """The image with the tracks' edges, their grids and every transition coloured by its deviation."""
    img = np.asarray(phase_deg, float)
    x0, x1, y0, y1 = _extent_um(img.shape, result.pixel_m)
    fig = Figure(figsize=(7.6, 5.6), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    lim = symmetric_limit(img)
    im = ax.imshow(img, origin="lower", extent=(x0, x1, y0, y1), cmap=phase_colormap(), vmin=-lim, vmax=lim,
                   interpolation="nearest")
    fig.colorbar(im, ax=ax, label="phase (deg), dark = attractive", shrink=0.8, extend="both")
    devs = np.concatenate([t.deviations_m for t in result.tracks]) if result.tracks else np.array([])
    finite = devs[np.isfinite(devs)]
    span = max(float(np.percentile(np.abs(finite), 98)) if finite.size else 0.0, 0.5e-9) * 1e9
    dev_cmap, dev_norm = colormaps["PiYG"], Normalize(-span, span)
    along_rows = result.tracks_along_rows
    # the tracks' skew: along-track shift per unit across (positions are where the track's core centre lies)
    px_down, px_across = (result.pixel_m[1], result.pixel_m[0]) if along_rows else result.pixel_m
    slope = result.skew_px_per_row * px_down / px_across
    for t in result.tracks:
        lo, hi = t.edges_m
        if t.core_m is not None:  # the rows averaged into the track's profile
            centre, half = t.core_m
        else:
            centre = t.centre_m if t.centre_m is not None else np.nanmean([e for e in (lo, hi) if e is not None])
            half = 0.2 * (t.width_m if t.width_m is not None else 0.2e-6)
        for e in (lo, hi):
            if e is not None:
                _line(ax, along_rows, e * 1e6, (x0, x1) if along_rows else (y0, y1), color="0.15", lw=0.8, ls="--")
        if t.bit_length_m and t.positions_m.size:
            g = t.phase_m + np.arange(np.floor((t.positions_m.min() - t.phase_m) / t.bit_length_m),
                                      np.ceil((t.positions_m.max() - t.phase_m) / t.bit_length_m) + 1) * t.bit_length_m
            for x in g:
                _bar(ax, along_rows, x, centre, (centre + half), (centre + 1.25 * half), slope, color="0.55",
                     lw=0.6)
        for x, d in zip(t.positions_m, t.deviations_m):
            colour = dev_cmap(dev_norm(d * 1e9)) if np.isfinite(d) else (0.3, 0.3, 0.3, 1.0)
            _bar(ax, along_rows, x, centre, (centre - half), (centre + half), slope, color=colour, lw=2.0)
    sm = fig.colorbar(_mappable(dev_cmap, dev_norm), ax=ax, shrink=0.8, extend="both")
    sm.set_label("transition: deviation from the bit-cell grid (nm)")
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect("equal")
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")
    ax.set_title(title)
    return fig


def _mappable(cmap, norm):
    from matplotlib.cm import ScalarMappable

    return ScalarMappable(norm=norm, cmap=cmap)


def _line(ax, along_rows, across, span, **kw):
    if along_rows:
        ax.plot(span, (across, across), **kw)
    else:
        ax.plot((across, across), span, **kw)


def _bar(ax, along_rows, along, centre, a, b, slope, **kw):
    """A bar across the track from ``a`` to ``b`` [m] through ``along`` at ``centre``, leaning with the skew."""
    ends = (along + slope * (a - centre), along + slope * (b - centre))
    if along_rows:
        ax.plot(tuple(e * 1e6 for e in ends), (a * 1e6, b * 1e6), solid_capstyle="butt", **kw)
    else:
        ax.plot((a * 1e6, b * 1e6), tuple(e * 1e6 for e in ends), solid_capstyle="butt", **kw)


def jitter_histogram_figure(result, *, title: str = "Transition jitter") -> Figure:
    """Deviations of all transitions from their tracks' grids, with the normal density of the jitter."""
    # the transitions the reported jitter was computed from (off-grid and outlying ones left out alike)
    devs = np.concatenate([t.deviations_m[t.in_jitter] if t.in_jitter is not None else t.deviations_m[:0]
                           for t in result.tracks]) * 1e9 if result.tracks else np.array([])
    devs = devs[np.isfinite(devs)]
    fig = Figure(figsize=(5.6, 4.0), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    if devs.size:
        jit = result.transition_jitter_m * 1e9 if result.transition_jitter_m else float(np.std(devs))
        span = max(4.0 * max(jit, float(np.std(devs))), float(np.abs(devs).max()) * 1.05, 0.5)
        bins = np.linspace(-span, span, int(np.clip(np.sqrt(devs.size) * 2, 8, 40)) + 1)
        ax.hist(devs, bins=bins, color="0.55", edgecolor="0.3", label=f"{devs.size} transitions")
        x = np.linspace(-span, span, 300)
        if jit > 0:
            density = np.exp(-0.5 * (x / jit) ** 2) / (jit * np.sqrt(2 * np.pi))
            ax.plot(x, density * devs.size * (bins[1] - bins[0]), color="#1b7837", lw=2,
                    label=f"normal, jitter {quantity(jit, 'nm', digits=3)} rms")
        ax.legend(loc="upper right", fontsize=9)
    else:
        ax.text(0.5, 0.5, "no transitions on a grid", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("deviation from the bit-cell grid (nm)")
    ax.set_ylabel("transitions")
    bl = result.bit_length_m
    ax.set_title(title + (f" (bit length {quantity(bl, 'm')})" if bl else ""))
    return fig


def write_media_figures(phase_deg: np.ndarray, result, out_dir: str | Path, *, prefix: str = "media") -> list[Path]:
    """Write the transition map and the jitter histogram (only for an image with tracks); returns the paths."""
    if not result.has_tracks:
        return []
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    return [save_png(transition_map_figure(phase_deg, result), out / f"{prefix}_transition_map.png"),
            save_png(jitter_histogram_figure(result), out / f"{prefix}_jitter_histogram.png")]
