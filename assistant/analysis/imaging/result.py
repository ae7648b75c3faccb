"""The result of an analysis of one or two lift heights (no decomposition)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..lift_series import NoiseVerdict, TipChange
from .parabola import BiasParabola

__all__ = ["DECOMPOSITION_MIN_HEIGHTS", "decomposition_needs", "ImagingAnalysis"]

DECOMPOSITION_MIN_HEIGHTS = 3


def decomposition_needs(n_heights: int) -> str:
    """The plain sentence for a series too short for the decomposition."""
    return (f"The decomposition into magnetic, electrostatic and short-range parts and the recommended lift "
            f"height need at least {DECOMPOSITION_MIN_HEIGHTS} lift heights; this series has {n_heights}, so "
            "they were not computed.")


@dataclass(frozen=True)
class ImagingAnalysis:
    """What a series of one or two lift heights tells (see the module docstring). :meth:`to_dict` for JSON.

    ``image_*`` arrays are (H,) or, with a bias grid, (H, B), in degrees. ``contrast_rms_deg`` is the rms
    about the image mean with the reference noise taken out in quadrature.
    """

    heights_m: np.ndarray
    bias_v: np.ndarray | None
    image_mean_deg: np.ndarray
    image_mean_std_deg: np.ndarray
    image_rms_deg: np.ndarray
    contrast_rms_deg: np.ndarray
    mean_std_source: str
    reference_noise_deg: float
    noise_source: str
    noise: NoiseVerdict
    tip_change: TipChange | None
    parabola: BiasParabola | None
    parabola_deg: np.ndarray | None     # the fitted parabola in degrees on ``parabola_bias_v``: (H, n)
    parabola_bias_v: np.ndarray | None
    nan_pixels: int
    signal_space: str                   # "gradient" (k and Q given) or "tan_phase" (-tan(phase) = Q F'/k)
    decomposition_sentence: str
    drive_phase_offset_deg: float | None = None      # with a bias grid: the free lever's phase from quadrature at
    drive_phase_offset_std_deg: float | None = None  # the drive, read from the means, which the inversion used

    kind = "imaging"

    @property
    def heights_nm(self) -> np.ndarray:
        return self.heights_m * 1e9

    @property
    def mean_phase_deg(self) -> np.ndarray:
        return self.image_mean_deg

    @property
    def cpd_v(self) -> float | None:
        return None if self.parabola is None else self.parabola.cpd_v

    @property
    def cpd_std_v(self) -> float | None:
        return None if self.parabola is None else self.parabola.cpd_std_v

    @property
    def cpd_needs_sentence(self) -> str:
        n = 0 if self.bias_v is None else int(np.unique(self.bias_v).size)
        return f"V_cpd needs at least three distinct biases; this series has {n}."

    @property
    def messages(self) -> tuple[str, ...]:
        out = [self.decomposition_sentence, self.noise.sentence]
        if self.parabola is not None:
            out.append(self.parabola.sentence)
        elif self.bias_v is not None:
            out.append(self.cpd_needs_sentence)
        if self.tip_change is not None:
            out.append(self.tip_change.sentence)
        return tuple(out)

    def to_dict(self) -> dict:
        """JSON-ready: only what was measured (no decomposition keys, no recommended lift height)."""
        def lst(a):
            return np.asarray(a, float).tolist()

        out = {
            "kind": self.kind,
            "heights_nm": lst(np.round(self.heights_nm, 9)),
            "decomposition": self.decomposition_sentence,
            "image_mean_deg": lst(self.image_mean_deg),
            "image_mean_std_deg": lst(self.image_mean_std_deg),
            "image_rms_deg": lst(self.image_rms_deg),
            "contrast_rms_deg": lst(self.contrast_rms_deg),
            "mean_std_source": self.mean_std_source,
            "phase_noise_deg": self.noise.measured_phase_noise_deg,
            "noise_source": self.noise_source,
            "thermal_phase_noise_deg": self.noise.thermal_phase_noise_deg,
            "noise_verdict": self.noise.verdict,
            "noise_sentence": self.noise.sentence,
            "nan_pixels": int(self.nan_pixels),
            "signal_space": self.signal_space,
        }
        if self.bias_v is not None:
            out["bias_v"] = lst(self.bias_v)
            if self.parabola is None:
                out["cpd_sentence"] = self.cpd_needs_sentence
        if self.parabola is not None:
            out.update(cpd_v=self.parabola.cpd_v, cpd_std_v=self.parabola.cpd_std_v,
                       cpd_sentence=self.parabola.sentence, bias_parabola_reduced_chi2=self.parabola.reduced_chi2,
                       drive_phase_offset_deg=self.drive_phase_offset_deg,
                       drive_phase_offset_std_deg=self.drive_phase_offset_std_deg)
        if self.tip_change is not None:
            out.update(tip_changed_sample=self.tip_change.irreversible,
                       tip_changed_fraction=self.tip_change.changed_fraction, tip_change=self.tip_change.sentence)
        return out
