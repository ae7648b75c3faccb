"""Calibration of the cantilever: thermal spectra and their peak fit, the Sader method, drive sweeps and force
curves. ``spectra`` imports scipy.signal only when an accumulator is made."""

from assistant.analysis._lazy import attach

# which module holds each public name; a name loads its module (and that module's scipy) on first use
__getattr__, __dir__ = attach(__name__, {
    "air": ("air_density_kg_m3", "air_viscosity_pa_s"),
    "force_curve": ("ContactInvolsResult", "ForceCurveError", "contact_invols", "stiff_sample_invols"),
    "sader": ("DEFAULT_TEMPERATURE_STD_K", "SaderResult", "hydrodynamic_circular", "hydrodynamic_rectangular",
              "omega_correction", "sader_spring_constant"),
    "spectra": ("SpectrumError", "WelchAccumulator", "WelchSpectrum", "welch_variance_inflation"),
    "sweep": ("QComparison", "SweepFitError", "SweepResult", "compare_q",
              "drive_amplitude_for_free_amplitude", "drive_frequency", "fit_drive_sweep", "oscillator_response",
              "setpoint_from_ratio", "sweep_response_v_per_v"),
    "thermal": ("DETECTION_FACTORS", "ThermalResult", "analyse_thermal_record", "calibrate_thermal",
              "default_segment_length", "invols_from_thermal", "sader_and_area_log_variance",
              "spring_constant_from_thermal"),
    "thermal_fit": ("ThermalFit", "ThermalFitError", "fit_thermal_spectrum", "oscillator_psd"),
})
