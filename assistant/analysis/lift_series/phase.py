"""Phase and force gradient of a second pass, and the signal unit the decomposition works in.

Sign convention (used throughout the analysis): ``z`` is the tip-sample gap, increasing away from the
surface; ``F`` is the z-component of the force, positive = repulsive; ``F' = dF/dz``. An attractive force
that strengthens on approach has ``F < 0`` and ``F' > 0``. The reported phase shift is
``phase = -arctan(Q F'/k)``: an attractive gradient gives a negative (dark) phase.

Driven off resonance, the free lever's phase sits ``offset`` away from quadrature, ``tan(offset) = Q (1 - u^2) / u``
with ``u`` the drive over the resonance frequency (the steady state of the driven damped oscillator with
stiffness ``k - F'``; textbook, e.g. Garcia & Perez 2002, Surf. Sci. Rep. 47, 197, from memory), so about
``-2 Q (f_drive - f0) / f0``. The phase is read against the free lever's, so
``phase = arctan(tan(offset) - Q F'/k) - offset``: no longer odd in F', and the on-resonance inversion then
scales a contrast by ``cos^2(phase + offset) / cos^2(phase)``, which depends on the phase the contrast sits on.
A drive 3.5 Hz below a 75 kHz resonance with Q = 200 (offset 1.06 deg) makes a contrast on a -27 deg
electrostatic phase 1.8 % larger than on one at -2 deg.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["phase_deg_from_gradient", "gradient_from_phase_deg", "linear_phase_slope_deg", "SignalSpace"]


def phase_deg_from_gradient(gradient_n_per_m, *, spring_constant_n_per_m: float, quality_factor: float,
                            offset_deg: float = 0.0):
    """Phase shift at fixed drive: ``-arctan(Q F'/k)`` in degrees on the free resonance, and
    ``arctan(tan(offset) - Q F'/k) - offset`` with the free lever's phase ``offset_deg`` from quadrature.

    Exact within the driven damped-oscillator model with stiffness ``k - F'`` (textbook; Hartmann 1999,
    Annu. Rev. Mater. Sci. 29, 53 for the small-gradient form). Attractive (F' > 0) -> negative phase.
    """
    g = np.asarray(gradient_n_per_m, dtype=float)
    if not offset_deg:
        return -np.degrees(np.arctan(quality_factor * g / spring_constant_n_per_m))
    t = np.radians(offset_deg)
    return np.degrees(np.arctan(np.tan(t) - quality_factor * g / spring_constant_n_per_m) - t)


def gradient_from_phase_deg(phase_deg, *, spring_constant_n_per_m: float, quality_factor: float,
                            offset_deg: float = 0.0):
    """Inverse of :func:`phase_deg_from_gradient`: ``F' = -(k/Q) tan(phase)`` [N/m], and
    ``-(k/Q) (tan(phase + offset) - tan(offset))`` with an offset."""
    p = np.asarray(phase_deg, dtype=float)
    if not offset_deg:
        return -spring_constant_n_per_m / quality_factor * np.tan(np.radians(p))
    t = np.radians(offset_deg)
    return -spring_constant_n_per_m / quality_factor * (np.tan(np.radians(p) + t) - np.tan(t))


def linear_phase_slope_deg(*, spring_constant_n_per_m: float, quality_factor: float) -> float:
    """``Q / k * 180 / pi`` [deg per N/m]: the magnitude of the phase per unit force gradient at small gradients,
    the slope of :func:`phase_deg_from_gradient` at zero (Hartmann 1999)."""
    return quality_factor / spring_constant_n_per_m * 180.0 / np.pi


@dataclass(frozen=True)
class SignalSpace:
    """The unit the decomposition fits in: the force gradient [N/m] when k and Q are known (the phase is
    inverted exactly per pixel, so the parts add linearly), otherwise the phase [deg] itself (small-angle
    approximation).

    ``offset_deg`` is the free lever's phase from quadrature at the drive (see the module; :mod:`.drive_offset`
    reads it from a bias grid): the phases as read are inverted with it. Every part is reported as the phase it
    alone would give with the drive on the resonance, ``-arctan(Q F'/k)``, a property of the tip and the sample
    that a few hertz of drive error do not change."""

    spring_constant_n_per_m: float | None = None
    quality_factor: float | None = None
    offset_deg: float = 0.0

    @property
    def exact(self) -> bool:
        return self.spring_constant_n_per_m is not None and self.quality_factor is not None

    @property
    def name(self) -> str:
        return "gradient" if self.exact else "phase"

    @property
    def slope_at_zero(self) -> float:
        """d|phase|/d signal at zero signal [deg per signal unit], on resonance."""
        if not self.exact:
            return 1.0
        return linear_phase_slope_deg(spring_constant_n_per_m=float(self.spring_constant_n_per_m),
                                      quality_factor=float(self.quality_factor))

    def from_phase(self, phase_deg):
        """The signal of a phase image as read (with the drive's offset)."""
        if not self.exact:
            return phase_deg
        return gradient_from_phase_deg(phase_deg, spring_constant_n_per_m=float(self.spring_constant_n_per_m),
                                       quality_factor=float(self.quality_factor), offset_deg=self.offset_deg)

    def to_phase(self, signal):
        """The phase [deg] a signal alone would give on resonance."""
        if not self.exact:
            return np.asarray(signal, float)
        return phase_deg_from_gradient(signal, spring_constant_n_per_m=float(self.spring_constant_n_per_m),
                                       quality_factor=float(self.quality_factor))

    def slope(self, signal):
        """d|phase|/d signal at ``signal`` on resonance: turns a standard error of the signal into one of a
        reported phase."""
        return self._slope(signal, 0.0)

    def read_slope(self, signal):
        """d|phase|/d signal at ``signal`` as read, with the drive's offset: turns the noise of a phase as read
        into that of its signal."""
        return self._slope(signal, np.tan(np.radians(self.offset_deg)))

    def _slope(self, signal, t):
        if not self.exact:
            return np.ones_like(np.asarray(signal, float))
        k, q = float(self.spring_constant_n_per_m), float(self.quality_factor)
        return self.slope_at_zero / (1.0 + (t - q * np.asarray(signal) / k) ** 2)
