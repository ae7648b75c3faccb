"""Topography and phase images of a lift-height series (matplotlib object API on the Agg canvas).

Phase uses one diverging map, built here in CIELAB, on a single scale shared by every lift height and centred
on zero. Its lightness rises steadily from the most negative to the most positive value, so an attractive
(negative) phase is *dark*, as the trade reads MFM images; the two signs also differ in hue (blue below zero,
yellow ochre above) with the chroma growing with |phase|, and zero is a neutral grey. Lightness and chroma change
linearly, so equal steps in phase are equal steps in CIELAB colour difference on each side of zero.
Topography uses matplotlib's perceptually uniform sequential ``viridis``, whose green-teal middle keeps it
from being mistaken for a phase image.
Pixels without data (lines not yet scanned, NaN readings) are left transparent over a grey hatch.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from matplotlib import colormaps
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import Colormap, ListedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle

# CIE 1931 XYZ of the D65 white and the XYZ -> linear sRGB matrix, IEC 61966-2-1:1999 (sRGB).
_WHITE_D65 = np.array([0.95047, 1.0, 1.08883])
_XYZ_TO_SRGB = np.array([[3.2406, -1.5372, -0.4986], [-0.9689, 1.8758, 0.0415], [0.0557, -0.2040, 1.0570]])

PHASE_L_RANGE = (20.0, 90.0)  # CIELAB lightness at -limit and +limit
PHASE_HUES_DEG = (290.0, 90.0)  # CIELAB hue angle below zero (blue) and above (yellow ochre)
PHASE_CHROMA_MAX = 42.0  # chroma at +-limit, just inside the sRGB gamut on both sides (44 is the edge)


def lab_to_srgb(lab: np.ndarray) -> np.ndarray:
    """CIELAB (D65) to gamma-encoded sRGB in [0, 1] before clipping; shape (..., 3) in and out.

    CIE 15:2004 (CIELAB inverse) and IEC 61966-2-1:1999 (sRGB primaries and transfer function).
    """
    lab = np.asarray(lab, dtype=np.float64)
    fy = (lab[..., 0] + 16.0) / 116.0
    f = np.stack([fy + lab[..., 1] / 500.0, fy, fy - lab[..., 2] / 200.0], axis=-1)
    delta = 6.0 / 29.0
    xyz = np.where(f > delta, f**3, 3 * delta**2 * (f - 4.0 / 29.0)) * _WHITE_D65
    linear = xyz @ _XYZ_TO_SRGB.T
    return np.where(linear <= 0.0031308, 12.92 * linear, 1.055 * np.abs(linear) ** (1 / 2.4) * np.sign(linear)
                    - 0.055)


def phase_lab(n: int = 256) -> np.ndarray:
    """The CIELAB colours of the phase map, from -limit to +limit; shape (n, 3)."""
    t = np.linspace(-1.0, 1.0, n)
    lo, hi = PHASE_L_RANGE
    lightness = 0.5 * (lo + hi) + 0.5 * (hi - lo) * t
    chroma = PHASE_CHROMA_MAX * np.abs(t)
    hue = np.radians(np.where(t < 0, PHASE_HUES_DEG[0], PHASE_HUES_DEG[1]))
    return np.stack([lightness, chroma * np.cos(hue), chroma * np.sin(hue)], axis=-1)


def phase_colormap(n: int = 256) -> Colormap:
    """Diverging map for phase: dark blue (negative, attractive), grey at zero, light yellow ochre (positive)."""
    cmap = ListedColormap(np.clip(lab_to_srgb(phase_lab(n)), 0.0, 1.0), name="mfma_phase")
    return cmap.with_extremes(bad=(0.0, 0.0, 0.0, 0.0))


def topography_colormap() -> Colormap:
    return colormaps["viridis"].with_extremes(bad=(0.0, 0.0, 0.0, 0.0))


def _padded(image: np.ndarray, lines: int | None) -> np.ndarray:
    """Rows beyond the scanned ones as NaN, so a partial frame keeps its shape and shows what is missing."""
    image = np.asarray(image, dtype=np.float64)
    if lines is None or lines <= image.shape[0]:
        return image
    out = np.full((lines, image.shape[1]), np.nan)
    out[: image.shape[0]] = image
    return out


def _draw(ax: Axes, image: np.ndarray, *, size_um: float, cmap: Colormap, norm: Normalize):
    extent = (0.0, size_um, 0.0, size_um)
    ax.add_patch(Rectangle((0, 0), size_um, size_um, facecolor="none", edgecolor="0.7", hatch="///",
                           linewidth=0, zorder=0))
    im = ax.imshow(image, origin="lower", extent=extent, cmap=cmap, norm=norm, interpolation="nearest", zorder=1)
    ax.set_xlim(0, size_um)
    ax.set_ylim(0, size_um)
    ax.set_aspect("equal")
    return im


def remove_plane(topography_m: np.ndarray) -> np.ndarray:
    """Subtract the least-squares plane through the finite pixels (display levelling only)."""
    z = np.asarray(topography_m, dtype=np.float64)
    rows, cols = np.indices(z.shape)
    ok = np.isfinite(z)
    if ok.sum() < 3:
        return z - np.nanmean(z) if ok.any() else z
    design = np.column_stack([np.ones(ok.sum()), rows[ok], cols[ok]])
    coef, *_ = np.linalg.lstsq(design, z[ok], rcond=None)
    return z - (coef[0] + coef[1] * rows + coef[2] * cols)


def topography_figure(topography_m: np.ndarray, *, scan_size_m: float, lines: int | None = None,
                      title: str = "Topography") -> Figure:
    """Topography in nm (plane removed) on a square frame ``scan_size_m`` wide, axes in µm."""
    height_nm = _padded(remove_plane(topography_m), lines) * 1e9
    finite = height_nm[np.isfinite(height_nm)]
    lo, hi = (np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0))
    if hi <= lo:
        lo, hi = lo - 0.5, hi + 0.5
    fig = Figure(figsize=(5.2, 4.4), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    im = _draw(ax, height_nm, size_um=scan_size_m * 1e6, cmap=topography_colormap(), norm=Normalize(lo, hi))
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")
    ax.set_title(title)
    fig.colorbar(im, ax=ax, label="height (nm), plane removed", extend="both")
    return fig


def shared_phase_limit(images: Sequence[np.ndarray]) -> float:
    """Half-range of the shared phase scale: the 99.5th percentile of |phase| over all images (deg)."""
    values = np.concatenate([np.abs(np.asarray(a, dtype=np.float64)).ravel() for a in images])
    values = values[np.isfinite(values)]
    limit = float(np.percentile(values, 99.5)) if values.size else 0.0
    return limit if limit > 0 else 1.0


def phase_figure(phase_deg: np.ndarray, *, heights_m: Sequence[float], scan_size_m: float,
                 repeat_phase_deg: np.ndarray | None = None, lines: int | None = None,
                 limit_deg: float | None = None, title: str = "Phase", per_height_scale: bool = False) -> Figure:
    """One panel per lift height (plus the repeat of the first height, if given) on one scale centred on 0.

    ``phase_deg`` has shape (heights, lines, pixels). Dark is negative (attractive). ``per_height_scale`` gives each
    panel its own scale (still centred on zero) and colour bar: the fine contrast of a high lift shows, but colours
    no longer compare between panels; the title says so.
    """
    stack = np.asarray(phase_deg, dtype=np.float64)
    if stack.ndim != 3 or stack.shape[0] != len(heights_m):
        raise ValueError(f"phase_deg must have shape (heights={len(heights_m)}, lines, pixels), got {stack.shape}")
    panels = [(_padded(img, lines), f"lift {h * 1e9:.4g} nm") for img, h in zip(stack, heights_m)]
    if repeat_phase_deg is not None:
        panels.append((_padded(repeat_phase_deg, lines), f"lift {heights_m[0] * 1e9:.4g} nm, repeat"))
    limit = limit_deg if limit_deg is not None else shared_phase_limit([p for p, _ in panels])
    norm = Normalize(-limit, limit)
    if per_height_scale:
        return _per_height_figure(panels, scan_size_m=scan_size_m, title=title)
    cols = min(len(panels), 4)
    rows = math.ceil(len(panels) / cols)
    fig = Figure(figsize=(2.6 * cols + 1.2, 2.6 * rows + 0.6), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, cols, squeeze=False, sharex=True, sharey=True)
    cmap = phase_colormap()
    im = None
    for k, ax in enumerate(axes.ravel()):
        if k >= len(panels):
            ax.set_axis_off()
            continue
        image, label = panels[k]
        im = _draw(ax, image, size_um=scan_size_m * 1e6, cmap=cmap, norm=norm)
        ax.set_title(label, fontsize=10)
        if k % cols == 0:
            ax.set_ylabel("y (µm)")
        if k + cols >= len(panels):  # nothing below this panel: it carries the x axis
            ax.set_xlabel("x (µm)")
            ax.tick_params(labelbottom=True)
    fig.suptitle(title)
    fig.colorbar(im, ax=axes.ravel().tolist(), label="phase (deg), dark = attractive", extend="both",
                 shrink=0.9)
    return fig


def _per_height_figure(panels, *, scan_size_m: float, title: str) -> Figure:
    cols = min(len(panels), 4)
    rows = math.ceil(len(panels) / cols)
    fig = Figure(figsize=(3.3 * cols + 0.6, 2.9 * rows + 0.8), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, cols, squeeze=False)
    cmap = phase_colormap()
    for k, ax in enumerate(axes.ravel()):
        if k >= len(panels):
            ax.set_axis_off()
            continue
        image, label = panels[k]
        limit = shared_phase_limit([image])
        im = _draw(ax, image, size_um=scan_size_m * 1e6, cmap=cmap, norm=Normalize(-limit, limit))
        ax.set_title(label, fontsize=10)
        ax.set_xlabel("x (µm)")
        ax.set_ylabel("y (µm)")
        fig.colorbar(im, ax=ax, label="phase (deg)", extend="both", shrink=0.85)
    fig.suptitle(f"{title}\neach lift height on its own colour scale; dark = attractive")
    return fig


def save_png(fig: Figure, path: str | Path, *, dpi: int = 120) -> Path:
    """Write ``fig`` as PNG through its Agg canvas; returns the path."""
    path = Path(path)
    if not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    fig.savefig(path, dpi=dpi, format="png")
    return path
