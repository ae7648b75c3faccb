"""The lift-height series: registration, Laplace continuation, image-mean parts, noise floor, tip change, the
tip-sample interaction regime and the recommended lift height.

Entry point: :func:`analyse_series` (module :mod:`.decomposition`), which returns a :class:`SeriesAnalysis`.
The continuation estimators are one module each (:mod:`.periodic`, :mod:`.reflected` with
:mod:`.reflected_drift`, :mod:`.windowed`); spatial frequencies and aliases are in :mod:`.frequencies`; the
image-mean physics in :mod:`.image_mean_models` and its fits in :mod:`.image_means`.
"""

from .continuation import ContinuationFit, resolution_period_m
from .decomposition import EDGES, analyse_series
from .errors import (HeightsMismatchError, HeightsNotIncreasingError, ImageShapeError, SeriesInputError,
                     TooFewBiasesError, TooFewHeightsError, TooManyInvalidPixelsError)
from .image_mean_models import centre_gap_m, first_pass_gap_offset_m, image_mean_shapes
from .image_means import MeanFit, fit_mean_bias_grid, fit_mean_heights
from .interaction_regime import REGIMES, InteractionRegime, classify_interaction, recommendation_with_regime
from .noise_floor import (NoiseVerdict, noise_verdict, thermal_min_gradient_n_per_m, thermal_min_phase_deg,
                          white_noise_std)
from .periodic import fit_continuation_periodic, fit_with_drift_periodic, leave_one_out_prediction
from .phase import SignalSpace, gradient_from_phase_deg, linear_phase_slope_deg, phase_deg_from_gradient
from .probe import ProbeModel
from .recommend import Recommendation, recommend_lift
from .reflected import fit_continuation_reflected
from .reflected_drift import fit_with_drift_reflected, reflect_align
from .registration import align_stack, estimate_drift_px, estimate_shift_px, fourier_shift
from .result import SeriesAnalysis
from .tip_change import TipChange, detect_tip_change
from .windowed import fit_continuation_windowed

__all__ = [
    "EDGES", "REGIMES", "ContinuationFit", "HeightsMismatchError", "HeightsNotIncreasingError", "ImageShapeError",
    "InteractionRegime", "MeanFit", "NoiseVerdict", "ProbeModel", "Recommendation", "SeriesAnalysis",
    "SeriesInputError", "SignalSpace", "TipChange", "TooFewBiasesError", "TooFewHeightsError",
    "TooManyInvalidPixelsError", "align_stack", "analyse_series", "centre_gap_m", "classify_interaction",
    "detect_tip_change", "estimate_drift_px", "estimate_shift_px", "first_pass_gap_offset_m",
    "fit_continuation_periodic", "fit_continuation_reflected", "fit_continuation_windowed", "fit_mean_bias_grid",
    "fit_mean_heights", "fit_with_drift_periodic", "fit_with_drift_reflected", "fourier_shift",
    "gradient_from_phase_deg", "image_mean_shapes", "leave_one_out_prediction", "linear_phase_slope_deg",
    "noise_verdict", "phase_deg_from_gradient", "recommend_lift", "recommendation_with_regime", "reflect_align",
    "resolution_period_m", "thermal_min_gradient_n_per_m", "thermal_min_phase_deg", "white_noise_std",
]
