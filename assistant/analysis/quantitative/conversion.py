"""From the measured second-pass signal to the force gradient, the measurement plane and the amplitude weight.

Sign convention of the project: z is the tip-sample gap, F' = dF/dz, and an attractive force that strengthens on
approach has F' > 0 and reads as a negative (dark) phase.
"""

from __future__ import annotations

import math

import numpy as np

from assistant.errors import InputError

__all__ = ["force_gradient_from_phase", "force_gradient_from_frequency_shift", "measurement_plane_m",
           "amplitude_weight"]


def _positive(name: str, value: float) -> float:
    v = float(value)
    if not (math.isfinite(v) and v > 0):
        raise InputError(f"{name} = {value!r} must be finite and > 0")
    return v


def force_gradient_from_phase(phase_deg: np.ndarray, *, spring_constant_n_per_m: float,
                              quality_factor: float) -> np.ndarray:
    """Force gradient F' [N/m] from the second-pass phase [deg].

    Inverts ``phase = -arctan(Q F'/k)``, the exact steady-state phase of a driven harmonic oscillator at its free
    resonance with the stiffness shifted by -F' (textbook; the small-gradient form -Q F'/k is in Hartmann 1999,
    Annu. Rev. Mater. Sci. 29, 53, from memory): ``F' = -(k/Q) tan(phase)``. Attractive F' > 0 reads negative.
    The same relation as ``assistant.analysis.lift_series.gradient_from_phase_deg`` (a test keeps them equal),
    written here with the checks of k, Q and |phase| < 90 deg so that this family does not import the lift-series
    family (about 1.5 s of imports) for one line.

    Parameters
    ----------
    phase_deg : phase shift against the free oscillation [deg], |phase| < 90.
    spring_constant_n_per_m : k [N/m].
    quality_factor : Q (dimensionless).
    """
    k = _positive("spring_constant_n_per_m", spring_constant_n_per_m)
    q = _positive("quality_factor", quality_factor)
    phase = np.asarray(phase_deg, dtype=float)
    if np.any(np.abs(phase[np.isfinite(phase)]) >= 90.0):
        raise InputError("phase shifts must lie within (-90, 90) deg")
    return -(k / q) * np.tan(np.radians(phase))


def force_gradient_from_frequency_shift(frequency_shift_hz: np.ndarray, *, spring_constant_n_per_m: float,
                                        resonance_hz: float) -> np.ndarray:
    """Force gradient F' [N/m] from the frequency shift [Hz] of a self-oscillating (FM) second pass.

    Inverts ``f = f0 sqrt(1 - F'/k)`` (exact for a linear force gradient; Albrecht, Grütter, Horne & Rugar 1991,
    J. Appl. Phys. 69, 668, from memory): ``F' = k (1 - (1 + df/f0)^2)``; attractive F' > 0 lowers f.
    """
    k = _positive("spring_constant_n_per_m", spring_constant_n_per_m)
    f0 = _positive("resonance_hz", resonance_hz)
    r = 1.0 + np.asarray(frequency_shift_hz, dtype=float) / f0
    return k * (1.0 - r * r)


def measurement_plane_m(lift_height_m: float, *, amplitude_m: float | None = None,
                        gap_offset_m: float | None = None) -> float:
    """Height of the measurement plane [m]: the closest approach of the oscillating tip during the second pass.

    The series convention (``assistant.analysis.lift_series.centre_gap_m``): the oscillation centre sits
    ``gap_offset + lift`` above the surface and the tip swings ``amplitude`` either side, so the closest
    approach is ``lift + gap_offset - amplitude``; ``gap_offset`` defaults to the amplitude (plane = lift).
    """
    lift = float(lift_height_m)
    if amplitude_m is None or gap_offset_m is None:
        plane = lift
    else:
        plane = lift + float(gap_offset_m) - float(amplitude_m)
    if not (math.isfinite(plane) and plane > 0):
        raise InputError(f"the measurement plane lift + gap offset - amplitude = {plane!r} m must be > 0")
    return plane


def amplitude_weight(k_per_m: np.ndarray, amplitude_m: float) -> np.ndarray:
    """Factor between the oscillation-averaged gradient and the gradient at the closest approach, per component.

    A field component decaying as exp(-k z) gives, with the Giessibl weight over a cycle of peak amplitude A,
    ``<exp(-k(d_min + A + q))> = exp(-k d_min) * exp(-kA) 2 I1(kA)/(kA)`` (Giessibl 2001, Appl. Phys. Lett. 78,
    123; Bessel-function integral of Abramowitz & Stegun 9.6.19; both from memory). Equals 1 at kA = 0 and
    falls monotonically; ``scipy.special.i1e`` carries the exp(-kA).
    """
    a = float(amplitude_m)
    if not (math.isfinite(a) and a >= 0):
        raise InputError(f"amplitude_m = {amplitude_m!r} must be finite and >= 0")
    from scipy.special import i1e  # here: loading scipy.special costs 0.15 s, and only a stated amplitude needs it

    x = np.asarray(k_per_m, dtype=float) * a
    out = np.ones_like(x)
    big = x > 1e-8
    out[big] = 2.0 * i1e(x[big]) / x[big]
    return out
