"""The probe and how it was operated: what the decomposition needs beyond the images."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["ProbeModel", "ASSUMED_AMPLITUDE_M", "TIP_RADIUS_REL_STD"]

ASSUMED_AMPLITUDE_M = 10e-9     # peak amplitude assumed where none is given (rule of thumb for MFM, no source)
TIP_RADIUS_REL_STD = 1.0 / 3.0  # relative uncertainty of a nominal tip radius (rule of thumb, no source)


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
        Nominal tip geometry of the electrostatic shape (exact sphere + Hudlet cone; ``cone_half_angle_deg=None``:
        no cone) and of the van der Waals sphere. The split of the image means is averaged over tips with a
        cone and without and radii ``tip_radius_rel_std`` either side (:mod:`.mean_parts`).
    tip_radius_rel_std : float
        Relative uncertainty of ``tip_radius_m``.
    amplitude_m : float, optional
        Peak oscillation amplitude [m] (finite-amplitude weighting, Giessibl 2001). None: not known;
        :data:`ASSUMED_AMPLITUDE_M` is assumed, the split of the image means is taken over half to twice it,
        and the output says so.
    gap_offset_m : float, optional
        Oscillation centre above the surface at zero lift [m]; None: not known; the amplitude (closest
        approach = lift height) is assumed and offsets down to half the amplitude enter the split's
        uncertainty. :func:`~.image_mean_models.first_pass_gap_offset_m` gives it from the setpoint.
    gap_offset_std_m : float, optional
        Standard uncertainty [m] of a given ``gap_offset_m``: the split of the image means is then averaged over
        that offset and offsets either side (:mod:`.tip_candidates`), so it enters the split's model uncertainty.
        None or 0: the offset is taken as exact. The setpoint rule's is
        :data:`~.image_mean_models.FIRST_PASS_GAP_OFFSET_STD_M`.
    phase_reference_std_deg : float, optional
        Standard error [deg] of the free lever's phase that was subtracted from every pass: its error is an
        offset of every image, which the short-range part (and the non-magnetic total) carries, so it joins their
        model uncertainty. None: not known, taken as 0.
    """

    spring_constant_n_per_m: float | None = None
    quality_factor: float | None = None
    resonance_hz: float | None = None
    bandwidth_hz: float | None = None
    temperature_k: float = 298.15
    tip_radius_m: float = 30e-9
    cone_half_angle_deg: float | None = 15.0
    cone_height_m: float = 10e-6
    amplitude_m: float | None = None
    gap_offset_m: float | None = None
    gap_offset_std_m: float | None = None
    tip_radius_rel_std: float = TIP_RADIUS_REL_STD
    phase_reference_std_deg: float | None = None

    @property
    def amplitude_or_assumed_m(self) -> float:
        """The amplitude, or :data:`ASSUMED_AMPLITUDE_M` where it was not given."""
        return ASSUMED_AMPLITUDE_M if self.amplitude_m is None else self.amplitude_m
