"""Colour scales for the terminal previews, built in the Oklab space so that equal steps look equal.

Phase images use a diverging scale centred on zero that also runs monotonically in lightness: negative phase
(attractive force gradient) is dark blue, zero a neutral mid grey, positive phase light amber. Because
lightness alone already orders the values, the scale still reads correctly in grey or for colour-blind
viewers. Every cell carries its own foreground and background colour, so the image looks the same on dark
and on light terminals.
"""

from __future__ import annotations

import math

import numpy as np

#: Number of distinct colours in a scale (the previews quantise to these).
LEVELS = 64


def oklab_to_srgb(lab: np.ndarray) -> np.ndarray:
    """Oklab (L, a, b) rows to gamma-encoded sRGB in [0, 1], clipped to the gamut.

    Matrices of Ottosson (2020), "A perceptual color space for image processing" (from memory); the sRGB
    transfer function of IEC 61966-2-1.
    """
    lab = np.atleast_2d(np.asarray(lab, dtype=float))
    m2_inv = np.array([[1.0, 0.3963377774, 0.2158037573],
                       [1.0, -0.1055613458, -0.0638541728],
                       [1.0, -0.0894841775, -1.2914855480]])
    m1_inv = np.array([[4.0767416621, -3.3077115913, 0.2309699292],
                       [-1.2684380046, 2.6097574011, -0.3413193965],
                       [-0.0041960863, -0.7034186147, 1.7076147010]])
    lms = (lab @ m2_inv.T) ** 3
    linear = np.clip(lms @ m1_inv.T, 0.0, 1.0)
    return np.where(linear <= 0.0031308, 12.92 * linear, 1.055 * linear ** (1 / 2.4) - 0.055)


def diverging_scale(levels: int = LEVELS) -> np.ndarray:
    """``levels`` sRGB colours (0-255 ints, shape (levels, 3)) from dark blue through grey to light amber.

    Lightness rises linearly from 0.30 to 0.93; chroma grows linearly away from the neutral centre. The end
    points are a design choice on perceptual grounds, not taken from any existing map.
    """
    t = np.linspace(-1.0, 1.0, levels)
    lightness = 0.615 + 0.315 * t
    chroma = 0.13 * np.abs(t)
    hue = np.where(t < 0, math.radians(255.0), math.radians(75.0))
    lab = np.column_stack([lightness, chroma * np.cos(hue), chroma * np.sin(hue)])
    return np.round(oklab_to_srgb(lab) * 255).astype(int)


def quantise_symmetric(values: np.ndarray, limit: float, levels: int = LEVELS) -> np.ndarray:
    """Indices into a diverging scale of ``levels`` colours for values in [-limit, limit]; -1 where NaN.

    Zero maps to the centre of the scale, so the same index means the same phase in every preview.
    """
    v = np.asarray(values, dtype=float)
    limit = float(limit) if limit and math.isfinite(limit) and limit > 0 else 1.0
    idx = np.floor((np.clip(v / limit, -1.0, 1.0) + 1.0) * 0.5 * (levels - 1) + 0.5)
    return np.where(np.isfinite(v), idx, -1).astype(int)


def symmetric_limit(values: np.ndarray, *, percentile: float = 99.0) -> float:
    """A shared scale limit: the given percentile of |values| (ignoring NaN), so one spike cannot wash out
    every preview; 1.0 when there is nothing finite yet."""
    v = np.abs(np.asarray(values, dtype=float))
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 1.0
    lim = float(np.percentile(v, percentile))
    return lim if lim > 0 else (float(v.max()) or 1.0)
