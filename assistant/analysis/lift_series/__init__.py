"""The lift-height series: registration, Laplace continuation, image-mean parts, noise floor, tip change, the
tip-sample interaction regime and the recommended lift height.

Entry point: :func:`analyse_series` (module :mod:`.decomposition`), which returns a :class:`SeriesAnalysis`.
The continuation estimators are one module each (:mod:`.periodic`, :mod:`.reflected` with
:mod:`.reflected_drift`, :mod:`.windowed`); spatial frequencies and aliases are in :mod:`.frequencies`; the
image-mean physics in :mod:`.image_mean_models`, its fits in :mod:`.image_means` and the measured total with
its tip-model-averaged split in :mod:`.mean_parts`; the noise of the images in :mod:`.image_noise` and the
standard errors in :mod:`.standard_errors`.
"""

from .continuation import ContinuationFit, resolution_period_m
from .decomposition import EDGES, analyse_series
from .errors import (HeightsMismatchError, HeightsNotIncreasingError, ImageShapeError, SeriesInputError,
                     TooFewBiasesError, TooFewHeightsError, TooManyInvalidPixelsError)
from .image_mean_models import centre_gap_m, first_pass_gap_offset_m, image_mean_shapes
from .image_means import MeanFit, fit_mean_bias_grid, fit_mean_heights
from .image_noise import band_noise_variance, shrunk_noise_variance
from .interaction_regime import REGIMES, InteractionRegime, classify_interaction, recommendation_with_regime
from .mean_parts import MeanParts, TipCandidate, magnetic_window_mean_cov, split_bias_grid, split_heights_only
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
from .standard_errors import drift_covariance, interior_power_variance
from .tip_change import TipChange, detect_tip_change
from .windowed import fit_continuation_windowed

__all__ = [
    "EDGES", "REGIMES", "ContinuationFit", "HeightsMismatchError", "HeightsNotIncreasingError", "ImageShapeError",
    "InteractionRegime", "MeanFit", "MeanParts", "NoiseVerdict", "ProbeModel", "Recommendation", "SeriesAnalysis",
    "SeriesInputError", "SignalSpace", "TipCandidate", "TipChange", "TooFewBiasesError", "TooFewHeightsError",
    "TooManyInvalidPixelsError", "align_stack", "analyse_series", "band_noise_variance", "centre_gap_m",
    "classify_interaction", "detect_tip_change", "drift_covariance", "estimate_drift_px", "estimate_shift_px",
    "first_pass_gap_offset_m", "fit_continuation_periodic", "fit_continuation_reflected",
    "fit_continuation_windowed", "fit_mean_bias_grid", "fit_mean_heights", "fit_with_drift_periodic",
    "fit_with_drift_reflected", "fourier_shift", "gradient_from_phase_deg", "image_mean_shapes",
    "interior_power_variance", "leave_one_out_prediction", "linear_phase_slope_deg", "magnetic_window_mean_cov",
    "noise_verdict", "phase_deg_from_gradient", "recommend_lift", "recommendation_with_regime", "reflect_align",
    "resolution_period_m", "shrunk_noise_variance", "split_bias_grid", "split_heights_only",
    "thermal_min_gradient_n_per_m", "thermal_min_phase_deg", "white_noise_std",
]
