"""Levelling an image: the least-squares plane through its finite pixels (numpy only, shared by the families and
the report)."""

from __future__ import annotations

import numpy as np

__all__ = ["remove_plane"]


def remove_plane(image: np.ndarray) -> np.ndarray:
    """``image`` minus its least-squares plane over the finite pixels (float64); NaN stays NaN. With fewer than
    three finite pixels only the mean is taken out."""
    z = np.asarray(image, dtype=np.float64)
    rows, cols = np.indices(z.shape)
    ok = np.isfinite(z)
    if ok.sum() < 3:
        return z - np.nanmean(z) if ok.any() else z
    design = np.column_stack([np.ones(ok.sum()), rows[ok], cols[ok]])
    coef, *_ = np.linalg.lstsq(design, z[ok], rcond=None)
    return z - (coef[0] + coef[1] * rows + coef[2] * cols)
