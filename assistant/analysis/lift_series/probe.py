"""The probe and how it was operated: what the decomposition needs beyond the images."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["ProbeModel"]


@dataclass(frozen=True)
class ProbeModel:
    """Probe, drive and detection of a lift series (SI units).

    Attributes
    ----------
    spring_constant_n_per_m, quality_factor : float, optional
        k [N/m] and Q: with both, the phase is inverted exactly to the force gradient
        (:class:`~.phase.SignalSpace`).
    resonance_hz, bandwidth_hz : float, optional
        f0 [Hz] and the detection bandwidth [Hz], for the thermal noise limit (Albrecht et al. 1991).
    temperature_k : float
        Temperature [K] of the thermal noise limit.
    tip_radius_m, cone_half_angle_deg, cone_height_m : float
        Tip geometry of the electrostatic shape (exact sphere + Hudlet cone; ``cone_half_angle_deg=None``:
        no cone) and of the van der Waals sphere.
    amplitude_m : float
        Peak oscillation amplitude [m] (finite-amplitude weighting, Giessibl 2001).
    gap_offset_m : float, optional
        Oscillation centre above the surface at zero lift [m]; None: ``amplitude_m`` (closest approach =
        lift height). :func:`~.image_mean_models.first_pass_gap_offset_m` gives it from the setpoint.
    """

    spring_constant_n_per_m: float | None = None
    quality_factor: float | None = None
    resonance_hz: float | None = None
    bandwidth_hz: float | None = None
    temperature_k: float = 298.15
    tip_radius_m: float = 30e-9
    cone_half_angle_deg: float | None = 15.0
    cone_height_m: float = 10e-6
    amplitude_m: float = 10e-9
    gap_offset_m: float | None = None
