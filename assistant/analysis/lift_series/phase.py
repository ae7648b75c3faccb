"""Phase and force gradient of a second pass, and the signal unit the decomposition works in.

Sign convention (used throughout the analysis): ``z`` is the tip-sample gap, increasing away from the
surface; ``F`` is the z-component of the force, positive = repulsive; ``F' = dF/dz``. An attractive force
that strengthens on approach has ``F < 0`` and ``F' > 0``. The reported phase shift is
``phase = -arctan(Q F'/k)``: an attractive gradient gives a negative (dark) phase.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["phase_deg_from_gradient", "gradient_from_phase_deg", "linear_phase_slope_deg", "SignalSpace"]


def phase_deg_from_gradient(gradient_n_per_m, *, spring_constant_n_per_m: float, quality_factor: float):
    """Phase shift at fixed drive on the free resonance: ``-arctan(Q F'/k)`` in degrees.

    Exact within the driven damped-oscillator model with stiffness ``k - F'`` (textbook; Hartmann 1999,
    Annu. Rev. Mater. Sci. 29, 53 for the small-gradient form). Attractive (F' > 0) -> negative phase.
    """
    g = np.asarray(gradient_n_per_m, dtype=float)
    return -np.degrees(np.arctan(quality_factor * g / spring_constant_n_per_m))


def gradient_from_phase_deg(phase_deg, *, spring_constant_n_per_m: float, quality_factor: float):
    """Inverse of :func:`phase_deg_from_gradient`: ``F' = -(k/Q) tan(phase)`` [N/m]."""
    p = np.asarray(phase_deg, dtype=float)
    return -spring_constant_n_per_m / quality_factor * np.tan(np.radians(p))


def linear_phase_slope_deg(*, spring_constant_n_per_m: float, quality_factor: float) -> float:
    """``Q / k * 180 / pi`` [deg per N/m]: the magnitude of the phase per unit force gradient at small gradients,
    the slope of :func:`phase_deg_from_gradient` at zero (Hartmann 1999)."""
    return quality_factor / spring_constant_n_per_m * 180.0 / np.pi


@dataclass(frozen=True)
class SignalSpace:
    """The unit the decomposition fits in: the force gradient [N/m] when k and Q are known (the phase is
    inverted exactly per pixel, so the parts add linearly), otherwise the phase [deg] itself (small-angle
    approximation). Every part is reported as the phase it alone would give."""

    spring_constant_n_per_m: float | None = None
    quality_factor: float | None = None

    @property
    def exact(self) -> bool:
        return self.spring_constant_n_per_m is not None and self.quality_factor is not None

    @property
    def name(self) -> str:
        return "gradient" if self.exact else "phase"

    @property
    def slope_at_zero(self) -> float:
        """d|phase|/d signal at zero signal [deg per signal unit]."""
        if not self.exact:
            return 1.0
        return linear_phase_slope_deg(spring_constant_n_per_m=float(self.spring_constant_n_per_m),
                                      quality_factor=float(self.quality_factor))

    def from_phase(self, phase_deg):
        """The signal of a phase image."""
        if not self.exact:
            return phase_deg
        return gradient_from_phase_deg(phase_deg, spring_constant_n_per_m=float(self.spring_constant_n_per_m),
                                       quality_factor=float(self.quality_factor))

    def to_phase(self, signal):
        """The phase [deg] a signal alone would give."""
        if not self.exact:
            return np.asarray(signal, float)
        return phase_deg_from_gradient(signal, spring_constant_n_per_m=float(self.spring_constant_n_per_m),
                                       quality_factor=float(self.quality_factor))

    def slope(self, signal):
        """d|phase|/d signal at ``signal``: turns a standard error of the signal into one of the phase."""
        if not self.exact:
            return np.ones_like(np.asarray(signal, float))
        k, q = float(self.spring_constant_n_per_m), float(self.quality_factor)
        return self.slope_at_zero / (1.0 + (q * np.asarray(signal) / k) ** 2)
