"""Helpers for the plotext panels: redraw on demand, decimate long curves, colours that read on any background."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from textual_plotext import PlotextPlot

#: Line colours chosen to stay legible on both dark and light themes (plotext colour names).
DATA, FIT, PART_A, PART_B, PART_C = "cyan", "red", "blue", "orange", "magenta"


def decimate_log(x: np.ndarray, y: np.ndarray, points: int = 300) -> tuple[np.ndarray, np.ndarray]:
    """At most ``points`` samples, spaced evenly in log(x): keeps a spectrum's shape for a small plot."""
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y) & (x > 0) & (y > 0)
    x, y = x[ok], y[ok]
    if x.size <= points:
        return x, y
    edges = np.geomspace(x[0], x[-1], points + 1)
    idx = np.unique(np.clip(np.searchsorted(x, edges), 0, x.size - 1))
    return x[idx], y[idx]


def decimate(x: np.ndarray, y: np.ndarray, points: int = 300) -> tuple[np.ndarray, np.ndarray]:
    """At most ``points`` evenly spaced samples (finite ones only)."""
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    if x.size <= points:
        return x, y
    idx = np.unique(np.linspace(0, x.size - 1, points).astype(int))
    return x[idx], y[idx]


def redraw(widget: PlotextPlot, draw: Callable[[object], None]) -> None:
    """Clear the widget's figure data, let ``draw(plt)`` plot, then refresh (plotext does not notice changes)."""
    plt = widget.plt
    plt.clear_data()
    draw(plt)
    widget.refresh()


def _si(value: float) -> str:
    for factor, prefix in ((1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "µ"), (1e-9, "n"),
                           (1e-12, "p"), (1e-15, "f"), (1e-18, "a")):
        if abs(value) >= factor:
            return f"{value / factor:g}{prefix}"
    return f"{value:.0e}"


def log_ticks(lo: float, hi: float) -> tuple[list[float], list[str]]:
    """Ticks (positions in log10 units) and their SI labels for the range [lo, hi] of log10 values: decades, or,
    for a range narrower than two decades, round values inside it (a fit window of 71-79 kHz gets 72k, 74k, ...)."""
    if hi - lo < 2:
        a, b = 10.0 ** lo, 10.0 ** hi
        step = 10.0 ** np.floor(np.log10((b - a) / 2)) if b > a else 10.0 ** np.floor(lo)
        for mult in (1, 2, 5, 10):
            if (b - a) / (step * mult) <= 5:
                step *= mult
                break
        values = np.arange(np.ceil(a / step) * step, b + 0.5 * step, step)
        values = values[(values >= a) & (values <= b) & (values > 0)]
        if values.size >= 2:
            return [float(np.log10(v)) for v in values], [_si(float(v)) for v in values]
    decades = list(range(int(np.floor(lo)), int(np.ceil(hi)) + 1))
    if len(decades) > 6:
        decades = decades[:: int(np.ceil(len(decades) / 6))]
    return [float(d) for d in decades], [_si(10.0 ** d) for d in decades]


def to_log(values) -> np.ndarray:
    """log10 of positive values (plotext's own log scale re-applies itself on every re-render, so the
    panels plot log10 values on linear axes and label the decades)."""
    return np.log10(np.asarray(values, dtype=float))
