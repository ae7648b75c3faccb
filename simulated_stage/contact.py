"""Short-range force including contact: van der Waals outside, DMT mechanics inside.

Derjaguin-Muller-Toporov model (Derjaguin, Muller & Toporov 1975, J. Colloid Interface Sci. 53, 314; in the
form used for dynamic AFM by e.g. Garcia & Perez 2002, Surf. Sci. Rep. 47, 197; written from memory):
for gaps z >= a0 the van der Waals force of vdw.py; for z < a0 (indentation delta = a0 - z)

    F = F_vdW(a0) + (4/3) E* sqrt(R) delta^(3/2),   1/E* = (1 - nu_t^2)/E_t + (1 - nu_s^2)/E_s,

so the force is continuous at a0 and the adhesion is the vdW force at the intermolecular distance a0.
"""

from __future__ import annotations

import numpy as np

from simulated_stage import vdw

INTERMOLECULAR_DISTANCE_M = 0.165e-9  # a0, the usual choice in dynamic-AFM modelling (Garcia & Perez 2002)
POISSON_RATIO = 0.3  # assumed for tip and sample (common practice, no source)


def reduced_modulus_pa(tip_modulus_pa: float, sample_modulus_pa: float, *,
                       tip_poisson: float = POISSON_RATIO, sample_poisson: float = POISSON_RATIO) -> float:
    """E* [Pa] of the Hertz/DMT contact."""
    return 1.0 / ((1.0 - tip_poisson**2) / tip_modulus_pa + (1.0 - sample_poisson**2) / sample_modulus_pa)


class ShortRangeForce:
    """vdW + DMT force law of the gap alone (vectorised)."""

    def __init__(self, *, hamaker_j: float, radius_m: float, reduced_modulus_pa: float,
                 a0_m: float = INTERMOLECULAR_DISTANCE_M) -> None:
        self.hamaker_j, self.radius_m, self.e_star, self.a0_m = hamaker_j, radius_m, reduced_modulus_pa, a0_m
        self._f_a0 = float(vdw.sphere_plane_force(a0_m, hamaker_j=hamaker_j, radius_m=radius_m))

    def force(self, z_m: np.ndarray) -> np.ndarray:
        """F [N] at apex gap z [m]; z < a0 is indentation."""
        z = np.asarray(z_m, float)
        outside = vdw.sphere_plane_force(np.maximum(z, self.a0_m), hamaker_j=self.hamaker_j,
                                         radius_m=self.radius_m)
        delta = np.maximum(self.a0_m - z, 0.0)
        inside = self._f_a0 + 4.0 / 3.0 * self.e_star * np.sqrt(self.radius_m) * delta**1.5
        return np.where(z >= self.a0_m, outside, inside)

    def gradient(self, z_m: np.ndarray) -> np.ndarray:
        """dF/dz [N/m]; in contact -2 E* sqrt(R delta) (the repulsion grows as z decreases)."""
        z = np.asarray(z_m, float)
        outside = vdw.sphere_plane_gradient(np.maximum(z, self.a0_m), hamaker_j=self.hamaker_j,
                                            radius_m=self.radius_m)
        delta = np.maximum(self.a0_m - z, 0.0)
        inside = -2.0 * self.e_star * np.sqrt(self.radius_m * delta)
        return np.where(z >= self.a0_m, outside, inside)
