"""The lift-height series: registration, Laplace continuation, image-mean parts, noise floor, tip change, the
tip-sample interaction regime and the recommended lift height.

Entry point: :func:`analyse_series` (module :mod:`.decomposition`), which returns a :class:`SeriesAnalysis`.
The continuation estimators are one module each (:mod:`.periodic`, :mod:`.reflected` with
:mod:`.reflected_drift`, :mod:`.windowed`), chosen and registered in :mod:`.magnetic_fit`; spatial
frequencies and aliases are in :mod:`.frequencies`; the image-mean physics in :mod:`.image_mean_models`, its
fits in :mod:`.image_means`, the measured total with its tip-model-averaged split in :mod:`.mean_parts` and
the lateral contact-potential term in :mod:`.lateral_cpd`; the noise of the images in :mod:`.image_noise` and
the standard errors in :mod:`.standard_errors`.
"""

from assistant.analysis._lazy import attach

# which module holds each public name; a name loads its module (and that module's scipy) on first use
__getattr__, __dir__ = attach(__name__, {
    "continuation": ("ContinuationFit", "resolution_period_m"),
    "decomposition": ("EDGES", "analyse_series"),
    "errors": ("HeightsMismatchError", "HeightsNotIncreasingError", "ImageShapeError", "SeriesInputError",
              "TooFewBiasesError", "TooFewHeightsError", "TooManyInvalidPixelsError"),
    "image_mean_models": ("FIRST_PASS_GAP_OFFSET_STD_M", "centre_gap_m", "first_pass_gap_offset_m",
              "image_mean_shapes"),
    "image_means": ("MeanFit", "cpd_sentence", "fit_mean_bias_grid", "fit_mean_heights", "plus_minus",
              "vertex_beyond", "vertex_beyond_sentence"),
    "image_noise": ("band_noise_variance", "shrunk_noise_variance"),
    "interaction_regime": ("REGIMES", "InteractionRegime", "classify_interaction",
              "recommendation_with_regime"),
    "mean_parts": ("MeanParts", "TipCandidate", "magnetic_window_mean_cov", "split_bias_grid",
              "split_heights_only"),
    "noise_floor": ("NoiseVerdict", "noise_verdict", "thermal_min_gradient_n_per_m", "thermal_min_phase_deg",
              "white_noise_std"),
    "periodic": ("fit_continuation_periodic", "fit_with_drift_periodic", "leave_one_out_prediction"),
    "phase": ("SignalSpace", "gradient_from_phase_deg", "linear_phase_slope_deg", "phase_deg_from_gradient"),
    "probe": ("ProbeModel",),
    "recommend": ("Recommendation", "recommend_lift"),
    "reflected": ("fit_continuation_reflected",),
    "reflected_drift": ("fit_with_drift_reflected", "reflect_align"),
    "registration": ("align_stack", "estimate_drift_px", "estimate_shift_px", "fourier_shift"),
    "result": ("SeriesAnalysis",),
    "standard_errors": ("drift_covariance", "interior_power_variance"),
    "tip_change": ("TipChange", "detect_tip_change"),
    "windowed": ("fit_continuation_windowed",),
})

__all__ = [
    "EDGES", "FIRST_PASS_GAP_OFFSET_STD_M", "REGIMES",
    "ContinuationFit", "HeightsMismatchError", "HeightsNotIncreasingError", "ImageShapeError",
    "InteractionRegime", "MeanFit", "MeanParts", "NoiseVerdict", "ProbeModel", "Recommendation", "SeriesAnalysis",
    "SeriesInputError", "SignalSpace", "TipCandidate", "TipChange", "TooFewBiasesError", "TooFewHeightsError",
    "TooManyInvalidPixelsError", "align_stack", "analyse_series", "band_noise_variance", "centre_gap_m",
    "classify_interaction", "cpd_sentence", "detect_tip_change", "drift_covariance", "estimate_drift_px",
    "estimate_shift_px", "first_pass_gap_offset_m", "fit_continuation_periodic", "fit_continuation_reflected",
    "fit_continuation_windowed", "fit_mean_bias_grid", "fit_mean_heights", "fit_with_drift_periodic",
    "fit_with_drift_reflected", "fourier_shift", "gradient_from_phase_deg", "image_mean_shapes",
    "interior_power_variance", "leave_one_out_prediction", "linear_phase_slope_deg", "magnetic_window_mean_cov",
    "noise_verdict", "phase_deg_from_gradient", "plus_minus", "recommend_lift", "recommendation_with_regime",
    "reflect_align", "resolution_period_m", "shrunk_noise_variance", "split_bias_grid", "split_heights_only",
    "thermal_min_gradient_n_per_m", "thermal_min_phase_deg", "vertex_beyond", "vertex_beyond_sentence",
    "white_noise_std",
]
