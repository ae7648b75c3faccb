"""Quantitative MFM: the tip transfer function (TTF) from a reference film and calibrated stray-field maps.

Modules: ``conversion`` (phase or frequency shift -> force gradient, measurement plane, amplitude weight),
``reference`` (the reference film's field and its pattern from an image), ``transfer`` (the TTF, its
regularisation and valid band), ``point_probe`` (the monopole/dipole fit), ``calibration`` (all of it with a
bias correction and the uncertainty the field map uses), ``field`` (Hz of a sample under test with a Monte Carlo
uncertainty), ``fourier`` (transforms, rings, windows). Conventions: z points away from the sample; F' = dF/dz,
attractive F' > 0 reads as a negative phase; the tip moment is +z unless stated; the measurement plane is the
closest approach of the oscillating tip.
"""

from assistant.analysis._lazy import attach

# which module holds each public name; a name loads its module (and that module's scipy) on first use
__getattr__, __dir__ = attach(__name__, {
    "calibration": ("TipCalibration", "calibrate_tip"),
    "conversion": ("amplitude_weight", "force_gradient_from_frequency_shift", "force_gradient_from_phase",
              "measurement_plane_m"),
    "field": ("FieldInputError", "FieldMap", "band_taper", "reconstruct_field"),
    "fourier": ("tukey",),
    "point_probe": ("MU_0", "PointProbeFit", "fit_point_probe", "point_probe_ttf"),
    "reference": ("film_factor", "film_field", "subpixel_sign"),
    "transfer": ("CalibrationInputError", "TransferEstimate", "calibrate_transfer"),
})

__all__ = [
    "TipCalibration", "calibrate_tip", "amplitude_weight", "force_gradient_from_frequency_shift",
    "force_gradient_from_phase", "measurement_plane_m", "FieldInputError", "FieldMap", "band_taper",
    "reconstruct_field", "MU_0", "PointProbeFit", "fit_point_probe", "point_probe_ttf", "film_factor",
    "film_field", "subpixel_sign", "CalibrationInputError", "TransferEstimate", "calibrate_transfer", "tukey",
]
