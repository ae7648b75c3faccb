"""Calibration of the cantilever: thermal spectra and their peak fit, the Sader method, drive sweeps and force
curves. ``spectra`` imports scipy.signal only when an accumulator is made."""

from .air import air_density_kg_m3, air_viscosity_pa_s
from .force_curve import ContactInvolsResult, ForceCurveError, contact_invols, stiff_sample_invols
from .sader import (
    SaderResult, hydrodynamic_circular, hydrodynamic_rectangular, omega_correction, sader_spring_constant,
)
from .spectra import SpectrumError, WelchAccumulator, WelchSpectrum, welch_variance_inflation
from .sweep import (
    QComparison, SweepFitError, SweepResult, compare_q, drive_amplitude_for_free_amplitude, drive_frequency,
    fit_drive_sweep, oscillator_response, setpoint_from_ratio, sweep_response_v_per_v,
)
from .thermal import (
    DETECTION_FACTORS, ThermalResult, analyse_thermal_record, calibrate_thermal, default_segment_length,
    invols_from_thermal, spring_constant_from_thermal,
)
from .thermal_fit import ThermalFit, ThermalFitError, fit_thermal_spectrum, oscillator_psd
