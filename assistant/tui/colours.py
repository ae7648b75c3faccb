"""Colour scale of the terminal previews: the project's phase map (:mod:`assistant.report.colours`, the same
as the report's figures) quantised to :data:`LEVELS` cells.

Every cell carries its own foreground and background colour, so the image looks the same on dark and on light
terminals.
"""

from __future__ import annotations

import math

import numpy as np

from assistant.report.colours import phase_rgb, symmetric_limit

__all__ = ["LEVELS", "diverging_scale", "quantise_symmetric", "symmetric_limit"]

#: Number of distinct colours in a scale (the previews quantise to these).
LEVELS = 64


def diverging_scale(levels: int = LEVELS) -> np.ndarray:
    """``levels`` sRGB colours (0-255 ints, shape (levels, 3)) of the phase map, from dark blue through grey to
    light yellow ochre."""
    return np.round(phase_rgb(levels) * 255).astype(int)


def quantise_symmetric(values: np.ndarray, limit: float, levels: int = LEVELS) -> np.ndarray:
    """Indices into a diverging scale of ``levels`` colours for values in [-limit, limit]; -1 where NaN.

    Zero maps to the centre of the scale, so the same index means the same phase in every preview.
    """
    v = np.asarray(values, dtype=float)
    limit = float(limit) if limit and math.isfinite(limit) and limit > 0 else 1.0
    idx = np.floor((np.clip(v / limit, -1.0, 1.0) + 1.0) * 0.5 * (levels - 1) + 0.5)
    return np.where(np.isfinite(v), idx, -1).astype(int)
