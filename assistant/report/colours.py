"""The one phase colour map of the project and the one colour-limit helper, for the report and the terminal UI.

Phase uses one diverging map built in CIELAB, on one scale centred on zero. Its lightness rises steadily from
the most negative to the most positive value, so an attractive (negative) phase is *dark*, as the trade reads
MFM images; the two signs also differ in hue (blue below zero, yellow ochre above) with the chroma growing with
|phase|, and zero is a neutral grey. Lightness and chroma change linearly, so equal steps in phase are equal
steps in CIELAB colour difference on each side of zero. Lightness alone orders the values, so the map still
reads in grey or for colour-blind viewers. Only numpy here: the terminal UI uses it without matplotlib.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["PHASE_L_RANGE", "PHASE_HUES_DEG", "PHASE_CHROMA_MAX", "lab_to_srgb", "phase_lab", "phase_rgb",
           "symmetric_limit"]

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


def phase_rgb(n: int = 256) -> np.ndarray:
    """The phase map as ``n`` gamma-encoded sRGB colours in [0, 1], from -limit to +limit; shape (n, 3)."""
    return np.clip(lab_to_srgb(phase_lab(n)), 0.0, 1.0)


def symmetric_limit(images: np.ndarray | Sequence[np.ndarray], *, percentile: float = 99.5) -> float:
    """Half-range of a scale centred on zero shared by ``images`` (one array or several): the ``percentile`` of
    |value| over every finite pixel, so that a few spikes cannot wash the scale out; the largest |value| where
    that percentile is zero, and 1 when there is nothing but zeros and NaN."""
    parts = [images] if isinstance(images, np.ndarray) else list(images)
    values = np.concatenate([np.abs(np.asarray(a, dtype=np.float64)).ravel() for a in parts]) if parts else \
        np.zeros(0)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return 1.0
    limit = float(np.percentile(values, percentile))
    return limit if limit > 0 else (float(values.max()) or 1.0)
