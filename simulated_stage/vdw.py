"""Non-retarded van der Waals force between a sphere (the apex) and a flat sample.

Full sphere-plane form (Hamaker 1937, Physica 4, 1058; Israelachvili, Intermolecular and Surface Forces,
3rd ed. 2011; written from memory and re-derived): W = -(H/6) [R/z + R/(z + 2R) + ln(z/(z + 2R))],
F = -dW/dz = -2 H R^3 / (3 z^2 (z + 2R)^2). It reduces to the proximity form -H R/(6 z^2) for z << R and
falls off as z^-4 for z >> R; at a 20 nm lift with R = 30 nm the proximity form overstates F by 1.78x.
Sign: F < 0 attractive, F' = dF/dz > 0.
"""

from __future__ import annotations

import numpy as np


def sphere_plane_force(z_m: np.ndarray, *, hamaker_j: float, radius_m: float) -> np.ndarray:
    """van der Waals force F [N] at gap z [m] (> 0); full non-retarded sphere-plane form."""
    z = np.asarray(z_m, float)
    return -2.0 * hamaker_j * radius_m**3 / (3.0 * z**2 * (z + 2.0 * radius_m) ** 2)


def sphere_plane_gradient(z_m: np.ndarray, *, hamaker_j: float, radius_m: float) -> np.ndarray:
    """dF/dz [N/m] of the full sphere-plane form: (4 H R^3/3) [1/(z^3 (z+2R)^2) + 1/(z^2 (z+2R)^3)]."""
    z = np.asarray(z_m, float)
    s = z + 2.0 * radius_m
    return 4.0 * hamaker_j * radius_m**3 / 3.0 * (1.0 / (z**3 * s**2) + 1.0 / (z**2 * s**3))


def proximity_force(z_m: np.ndarray, *, hamaker_j: float, radius_m: float) -> np.ndarray:
    """Proximity (z << R) form -H R/(6 z^2) [N], for comparisons only."""
    return -hamaker_j * radius_m / (6.0 * np.asarray(z_m, float) ** 2)
