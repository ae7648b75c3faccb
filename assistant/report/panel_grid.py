"""A grid of square image panels with one colour bar, placed at fixed margins (inches) instead of by a layout engine.

Image figures have a regular shape (equal square panels, short tick labels in µm, one colour bar), so their
geometry can be worked out in advance. Matplotlib's constrained layout measures every label of every axis in an
extra drawing pass before the real one, which doubled the time of a many-panel phase figure; placing the axes
directly costs nothing. The margins below leave room for the labels the image figures carry: panel titles, axis
labels in µm, a figure title of up to two lines and a labelled colour bar.
"""

from __future__ import annotations

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

LEFT_IN = 0.75  # y tick labels and the y label
BOTTOM_IN = 0.55  # x tick labels and the x label
TITLE_IN = 0.3  # one panel title
SUPTITLE_IN = 0.32  # one line of the figure title
XLABELS_IN = 0.5  # x tick labels and label of a panel that is not in the bottom row
GAP_IN = 0.18  # between panels side by side (shared y: no tick labels between them)
BAR_PAD_IN = 0.18  # between the last panel and the colour bar
BAR_WIDTH_IN = 0.14
BAR_LABELS_IN = 0.95  # the colour bar's tick labels and its label, rotated


def panel_grid(fig: Figure, rows: int, cols: int, *, title_lines: int = 1, inner_xlabels: bool = False,
               share: bool = True, bar_fraction: float = 0.9) -> tuple[np.ndarray, Axes]:
    """``rows`` × ``cols`` square axes (an object array, like ``Figure.subplots(squeeze=False)``) and a colour-bar
    axes beside them, centred in ``fig``.

    ``title_lines``: lines of the figure title above the panels (0: none). ``inner_xlabels``: some panel above the
    bottom row carries x labels, so rows are spaced to leave room for them. ``share``: the panels share x and y
    (as ``sharex=sharey=True``). ``bar_fraction``: the colour bar's height as a fraction of the panels' height.
    """
    width, height = fig.get_size_inches()
    top = SUPTITLE_IN * title_lines + TITLE_IN
    row_gap = TITLE_IN + (XLABELS_IN if inner_xlabels else 0.1)
    right = BAR_PAD_IN + BAR_WIDTH_IN + BAR_LABELS_IN
    side = min((width - LEFT_IN - right - (cols - 1) * GAP_IN) / cols,
               (height - BOTTOM_IN - top - (rows - 1) * row_gap) / rows)
    if side <= 0:
        raise ValueError(f"a {width:.3g} × {height:.3g} in figure has no room for {rows} × {cols} panels")
    grid_w = cols * side + (cols - 1) * GAP_IN
    grid_h = rows * side + (rows - 1) * row_gap
    x0 = LEFT_IN + (width - LEFT_IN - right - grid_w) / 2
    y0 = BOTTOM_IN + (height - BOTTOM_IN - top - grid_h) / 2
    axes = np.empty((rows, cols), dtype=object)
    first = None
    for r in range(rows):
        for c in range(cols):
            x = x0 + c * (side + GAP_IN)
            y = y0 + (rows - 1 - r) * (side + row_gap)
            shared = {"sharex": first, "sharey": first} if share and first is not None else {}
            ax = fig.add_axes((x / width, y / height, side / width, side / height), **shared)
            if share and first is not None:
                if c:
                    ax.tick_params(labelleft=False)
                if r < rows - 1:
                    ax.tick_params(labelbottom=False)
            first = first or ax
            axes[r, c] = ax
    if share and rows > 1:
        first.tick_params(labelbottom=False)
    bar_h = grid_h * bar_fraction
    cax = fig.add_axes(((x0 + grid_w + BAR_PAD_IN) / width, (y0 + (grid_h - bar_h) / 2) / height,
                        BAR_WIDTH_IN / width, bar_h / height))
    return axes, cax


CELL_LEFT_IN = 0.7  # y tick labels and label of each panel
CELL_BOTTOM_IN = 0.55  # x tick labels and label of each panel
CELL_BAR_PAD_IN = 0.12
CELL_BAR_LABELS_IN = 0.85


def panels_with_bars(fig: Figure, rows: int, cols: int, *, title_lines: int = 2, bar_fraction: float = 0.85
                     ) -> tuple[np.ndarray, np.ndarray]:
    """``rows`` × ``cols`` square axes, each with its own colour-bar axes on its right, every panel labelled on
    both axes; returns the panels and the bars as flat object arrays in reading order."""
    width, height = fig.get_size_inches()
    top = SUPTITLE_IN * title_lines
    cell_w, cell_h = width / cols, (height - top) / rows
    side = min(cell_w - CELL_LEFT_IN - CELL_BAR_PAD_IN - BAR_WIDTH_IN - CELL_BAR_LABELS_IN,
               cell_h - CELL_BOTTOM_IN - TITLE_IN)
    if side <= 0:
        raise ValueError(f"a {width:.3g} × {height:.3g} in figure has no room for {rows} × {cols} panels")
    axes, bars = [], []
    for r in range(rows):
        for c in range(cols):
            x = c * cell_w + CELL_LEFT_IN
            y = (rows - 1 - r) * cell_h + CELL_BOTTOM_IN + (cell_h - CELL_BOTTOM_IN - TITLE_IN - side) / 2
            axes.append(fig.add_axes((x / width, y / height, side / width, side / height)))
            bar_h = side * bar_fraction
            bars.append(fig.add_axes(((x + side + CELL_BAR_PAD_IN) / width, (y + (side - bar_h) / 2) / height,
                                      BAR_WIDTH_IN / width, bar_h / height)))
    return np.array(axes, dtype=object), np.array(bars, dtype=object)


def fixed_margins(fig: Figure, *, left: float = 0.95, right: float = 0.25, bottom: float = 0.55, top: float = 0.6,
                  hspace: float = 0.75) -> None:
    """Stacked line plots at margins given in inches (``hspace``: between panels, for a title and x labels)
    instead of a layout engine; call after the axes exist."""
    width, height = fig.get_size_inches()
    rows = max(1, len([ax for ax in fig.axes if ax.get_subplotspec() is not None]))
    panel = (height - top - bottom - (rows - 1) * hspace) / rows
    fig.subplots_adjust(left=left / width, right=1 - right / width, bottom=bottom / height, top=1 - top / height,
                        hspace=hspace / max(panel, 1e-3))
