"""Readable names for the keys of stored records and JSON results (``k_n_per_m`` -> "spring constant k").

The keys stay what they are in files and JSON (a contract); a person reads these names instead. Standard library
only, so the command line can use it without loading matplotlib or h5py.
"""

from __future__ import annotations

from assistant.formatting import DASH, quantity, yes_no

__all__ = ["label", "unit_of", "readable_value", "field_path", "FLAGS"]

_INVOLS = "optical-lever sensitivity (InvOLS)"

#: key -> (name, unit of the stored value). Units use the storage spelling; formatting writes them for a person.
NAMES: dict[str, tuple[str, str]] = {
    # calibration
    "k_n_per_m": ("spring constant k", "N/m"), "k_source": ("k from", ""),
    "f0_hz": ("resonance f0", "Hz"), "q": ("quality factor Q", ""),
    "invols_nm_per_v": (_INVOLS, "nm/V"), "invols_source": ("sensitivity from", ""),
    "sweep_f0_hz": ("resonance f0 (drive sweep)", "Hz"), "sweep_q": ("quality factor Q (drive sweep)", ""),
    "drive_frequency_hz": ("drive frequency", "Hz"), "drive_amplitude_v": ("drive amplitude", "V"),
    "free_amplitude_nm": ("free amplitude", "nm"), "free_amplitude_v": ("free amplitude (detector)", "V"),
    "setpoint_v": ("amplitude setpoint", "V"), "phase_reference_deg": ("phase reference", "deg"),
    "temperature_k": ("temperature", "K"), "probe_name": ("probe", ""), "calibrated_utc": ("calibrated (UTC)", ""),
    "thermal_check_k_n_per_m": ("k from the thermal spectrum (check)", "N/m"),
    "thermal_check_agree": ("thermal k agrees with the Sader k", ""),
    "thermal_check_difference_sigma": ("thermal k minus Sader k, in standard errors", ""),
    "sader_k_n_per_m": ("Sader: spring constant k", "N/m"), "sader_reynolds": ("Sader: Reynolds number", ""),
    "sader_gamma_imag": ("Sader: imaginary part of the hydrodynamic function", ""),
    "sader_density_kg_m3": ("Sader: air density", "kg/m^3"), "sader_viscosity_pa_s": ("Sader: air viscosity", "Pa s"),
    "spectrum_rate_hz": ("thermal record sample rate", "Hz"),
    "spectrum_segment_length": ("spectrum segment length (samples)", ""),
    "spectrum_segments": ("spectrum averages (segments)", ""),
    "spectrum_variance_inflation": ("spectrum variance inflation (overlap)", ""),
    "fit_frequency_hz": ("fit window: frequency", "Hz"), "fit_psd_v2_per_hz": ("fit window: measured PSD", "V^2/Hz"),
    "fit_model_v2_per_hz": ("fit window: fitted PSD", "V^2/Hz"),
    "spectrum_frequency_hz": ("thermal spectrum: frequency", "Hz"),
    "spectrum_psd_v2_per_hz": ("thermal spectrum: PSD", "V^2/Hz"),
    "peak_area_v2": ("thermal peak area", "V^2"), "correction_factor": ("Butt-Jaschke factor", ""),
    # resonance sweep
    "amplitude_at_resonance_v": ("amplitude at resonance", "V"), "phase_offset_deg": ("phase offset", "deg"),
    "frequency_hz": ("frequency", "Hz"), "amplitude_v": ("amplitude", "V"), "phase_deg": ("phase", "deg"),
    # approach
    "engaged": ("engaged", ""), "z_m": ("Z extension at engage", "m"), "coarse_position_m": ("coarse position", "m"),
    "coarse_travel_m": ("coarse travel", "m"), "cycles": ("approach cycles", ""),
    "trace_amplitude_v": ("trace: amplitude", "V"), "trace_coarse_m": ("trace: coarse position", "m"),
    "trace_z_m": ("trace: Z extension", "m"),
    # decomposition
    "heights_nm": ("lift height", "nm"), "magnetic_rms_deg": ("magnetic rms", "deg"),
    "electrostatic_mean_deg": ("electrostatic mean", "deg"), "short_range_mean_deg": ("short-range mean", "deg"),
    "residual_rms_deg": ("continuation residual rms", "deg"),
    "residual_rms_interior_deg": ("continuation residual rms (interior)", "deg"),
    "expected_residual_rms_deg": ("residual rms expected from noise", "deg"),
    "residual_at_noise": ("residual at noise level", ""), "noise_deg": ("noise per pixel", "deg"),
    "drift_px": ("drift (rows, columns)", "px"), "drift_px_per_bias": ("drift per bias (rows, columns)", "px"),
    "part_correlation": ("correlation of the electrostatic and short-range fits", ""),
    "resolution_period_nm": ("shortest resolved period", "nm"),
    "cpd_v": ("contact potential difference V_cpd", "V"), "recommended_lift_nm": ("recommended lift height", "nm"),
    "recommended_bias_v": ("recommended tip bias", "V"), "recommendation": ("recommendation", ""),
    "separable": ("electrostatic and short-range parts separable", ""), "separability": ("separability", ""),
    "edge": ("edge treatment", ""), "edge_band_px": ("edge band left out", "px"), "edge_note": ("edge note", ""),
    "phase_noise_deg": ("phase noise (measured)", "deg"),
    "thermal_phase_noise_deg": ("phase noise (thermal limit)", "deg"),
    "noise_verdict": ("noise verdict", ""), "noise_sentence": ("noise", ""), "nan_pixels": ("pixels without data", ""),
    "signal_space": ("fitted quantity", ""), "tip_changed_sample": ("tip changed the sample", ""),
    "tip_changed_fraction": ("area changed by the tip", ""),
    "interaction_regime": ("tip-sample interaction", ""), "interaction_evidence": ("tip-sample interaction", ""),
    "interaction_negligible": ("tip-sample interaction negligible", ""),
    "negligible_from_nm": ("tip-sample interaction negligible from", "nm"),
    "even_attraction_mean_deg": ("attraction in the image mean beyond van der Waals, either polarity", "deg"),
    "even_attraction_lateral_deg": ("attraction in the residual that follows |magnetic contrast|", "deg"),
    # stray-field map (quantitative MFM)
    "height_nm": ("plane of the map above the sample", "nm"),
    "measurement_plane_nm": ("measurement plane (closest approach of the tip)", "nm"),
    "pixel_row_nm": ("pixel spacing between lines", "nm"), "pixel_col_nm": ("pixel spacing along a line", "nm"),
    "band_short_nm": ("valid band: shortest period", "nm"), "band_long_nm": ("valid band: longest period", "nm"),
    "margin_px": ("edge margin", "px"), "hz_a_per_m": ("stray field Hz", "A/m"),
    "hz_std_a_per_m": ("standard uncertainty of Hz", "A/m"), "hz_rms_a_per_m": ("stray field Hz rms", "A/m"),
    "hz_min_a_per_m": ("stray field Hz minimum", "A/m"), "hz_max_a_per_m": ("stray field Hz maximum", "A/m"),
    "tip_file": ("tip file (TTF)", ""), "tip_created_utc": ("TTF made (UTC)", ""), "probe": ("probe", ""),
}

#: Keys stored as 1/0 that mean yes/no.
FLAGS = frozenset({"engaged", "separable", "tip_changed_sample", "thermal_check_agree", "residual_at_noise",
                   "complete", "repeat_first", "interaction_negligible"})

_SUFFIX_UNITS = ((("n", "per", "m"), "N/m"), (("a", "per", "m"), "A/m"), (("n", "per", "a"), "N/A"),
                 (("nm", "per", "v"), "nm/V"), (("v2", "per", "hz"), "V^2/Hz"),
                 (("kg", "m3"), "kg/m^3"), (("pa", "s"), "Pa s"), (("hz",), "Hz"), (("nm",), "nm"), (("m",), "m"),
                 (("v",), "V"), (("deg",), "deg"), (("s",), "s"), (("k",), "K"), (("px",), "px"), (("utc",), ""))


def _split(key: str) -> tuple[str, str]:
    tokens = key.split("_")
    for suffix, unit in _SUFFIX_UNITS:
        n = len(suffix)
        if len(tokens) > n and tuple(t.lower() for t in tokens[-n:]) == suffix:
            return " ".join(tokens[:-n]), unit
    return " ".join(tokens), ""


def label(key: str) -> str:
    """The readable name of ``key``; unknown keys lose their unit suffix and underscores (``std`` -> uncertainty)."""
    if key in NAMES:
        return NAMES[key][0]
    name, _ = _split(key)
    return name.replace(" std", " uncertainty")


def unit_of(key: str) -> str:
    """The unit of the value stored under ``key`` (storage spelling; empty when dimensionless)."""
    return NAMES[key][1] if key in NAMES else _split(key)[1]


def readable_value(key: str, value, std=None, *, unit: str | None = None, digits: int = 5) -> str:
    """``value`` of ``key`` for a person: flags as yes/no, text as it is, numbers with their unit and ``±``."""
    if key in FLAGS:
        return yes_no(value)
    if value is None:
        return DASH
    if isinstance(value, str):
        return value or DASH
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if key == "tip_changed_fraction":
        from assistant.formatting import percent

        return percent(value)
    return quantity(value, unit if unit is not None else unit_of(key), std, digits=digits)


def field_path(fields_a_per_m) -> str:
    """The applied fields of a field series [A/m] for people: the first, every turning point and the last, and
    the number of steps (``-450 kA/m … 450 kA/m … -450 kA/m (37 steps)``)."""
    from assistant.procedures.field_series import turning_points  # the one definition of a turning point

    fields = list(fields_a_per_m)
    return " … ".join(quantity(v, "A/m") for v in turning_points(fields, len(fields))) + f" ({len(fields)} steps)"
