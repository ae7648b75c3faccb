"""Analyses of stored data: the lift-series decomposition of a session file or a .npz stack (stored back into
the session file), and the refit of a stored thermal spectrum."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from assistant.analysis.imaging import DECOMPOSITION_MIN_HEIGHTS, ImagingAnalysis, analyse_imaging
from assistant.analysis.lift_series import (FIRST_PASS_GAP_OFFSET_STD_M, ProbeModel, SeriesAnalysis,
                                            SeriesInputError, analyse_series, first_pass_gap_offset_m)
from assistant.procedures.events import Notice, Sink, null_sink

DEFAULT_TIP_RADIUS_M = 30e-9  # nominal apex radius of a magnetic-coated tip; a setting, not a measurement


def pixel_bandwidth_hz(line_rate_hz: float, pixels: int) -> float:
    """Noise bandwidth of one pixel of a pass [Hz]: a line at ``line_rate_hz`` is a trace and a retrace, so a trace
    pixel dwells ``1 / (2 rate pixels)`` (common practice, no source; the simulated stage's definition too), and an
    average over a dwell T has the noise-equivalent bandwidth ``1 / (2 T)``, so ``rate * pixels``. The lock-in's
    own low-pass, unknown here, narrows it a little (0.1 ms: by 5 % at 1 Hz and 128 pixels)."""
    return float(line_rate_hz) * int(pixels)


def stored_probe(settings: dict, *, line_rate_hz: float | None = None, pixels: int | None = None):
    """The :class:`ProbeModel` of a series from its stored settings (the drive,
    k, Q and temperature the workflow kept beside the series settings)."""
    drive = settings.get("drive") or {}
    amp = drive.get("free_amplitude_m")
    ratio = drive.get("setpoint_ratio")
    fields = {"spring_constant_n_per_m": settings.get("spring_constant_n_per_m"),
              "quality_factor": settings.get("quality_factor"),
              "temperature_k": settings.get("temperature_k") or 295.15,
              "resonance_hz": drive.get("frequency_hz"),
              "phase_reference_std_deg": drive.get("phase_reference_std_deg"),
              "tip_radius_m": DEFAULT_TIP_RADIUS_M}
    if line_rate_hz and pixels:
        fields["bandwidth_hz"] = pixel_bandwidth_hz(line_rate_hz, pixels)
    if amp:
        fields["amplitude_m"] = float(amp)
        if ratio:
            fields["gap_offset_m"] = first_pass_gap_offset_m(amp, ratio)
            fields["gap_offset_std_m"] = FIRST_PASS_GAP_OFFSET_STD_M  # the rule's, into the split's uncertainty
    return ProbeModel(**{k: v for k, v in fields.items() if v is not None})


def analyse_session_series(session, name: str | None, *, sink: Sink = null_sink, short_range_fraction: float = 0.1,
                           write: bool = True, edge: str = "auto"):
    """Analyse series ``name`` (default: the last) of an open session file and store the result in it."""
    names = session.series_names()
    if not names:
        raise SeriesInputError("the session file holds no series")
    name = name or names[-1]
    if name not in names:
        raise SeriesInputError(f"no series {name!r} in the session file (have: {', '.join(names)})")
    data = session.read_series(name)
    if data.completed_lines < 4:
        raise SeriesInputError(f"series {name!r} has {data.completed_lines} completed lines; need at least 4")
    settings = json.loads(data.settings_json or "{}")
    if data.heights_m.size < DECOMPOSITION_MIN_HEIGHTS:  # one or two heights: what they tell, no decomposition
        result = analyse_imaging_series(data, settings)
    else:
        probe = stored_probe(settings, line_rate_hz=data.line_rate_hz, pixels=data.pixels)
        result = analyse_series(np.asarray(data.phase_deg, dtype=float),
                                heights_m=np.asarray(data.heights_m, dtype=float),
                                pixel_m=(data.scan_size_m / data.lines, data.scan_size_m / data.pixels),
                                bias_v=None if data.biases_v is None else np.asarray(data.biases_v, dtype=float),
                                repeat_phase_deg=data.repeat_phase_deg, probe=probe,
                                short_range_fraction=short_range_fraction, edge=edge)
    if write:
        scalars, arrays = storage_form(result.to_dict())
        # the whole decomposition is kept for the report; the imaging result is recomputed in milliseconds
        whole = result.to_record() if isinstance(result, SeriesAnalysis) else None
        session.write_analysis(name, scalars, arrays, result=whole)
    for text in getattr(result, "messages", ()):
        sink(Notice("info", text))
    from assistant.storage.resume import resumed_sentence

    seams = resumed_sentence(tuple(k for k in data.resumed_at_lines if k < data.completed_lines), data.lines)
    if seams:
        sink(Notice("warning", f"series {name!r} was {seams}"))
    return result


def analyse_imaging_series(data, settings: dict) -> ImagingAnalysis:
    """One or two lift heights (a ``SeriesData``): image statistics, noise, repeat check, V_cpd of a bias grid.
    k, Q, f0, the free amplitude and the temperature come from the stored settings; what was not stored is not
    assumed (the noise then has no thermal verdict)."""
    drive = settings.get("drive") or {}
    known = {"spring_constant_n_per_m": settings.get("spring_constant_n_per_m"),
             "quality_factor": settings.get("quality_factor"), "resonance_hz": drive.get("frequency_hz"),
             "amplitude_m": drive.get("free_amplitude_m"), "temperature_k": settings.get("temperature_k")}
    return analyse_imaging(data.phase_deg, heights_m=data.heights_m, bias_v=data.biases_v,
                           repeat_phase_deg=data.repeat_phase_deg,
                           bandwidth_hz=pixel_bandwidth_hz(data.line_rate_hz, data.pixels),
                           **{k: float(v) for k, v in known.items() if v is not None})


def stored_series_analysis(session, name: str) -> SeriesAnalysis | ImagingAnalysis:
    """The decomposition of series ``name`` as it was stored with the series; a series that was never analysed
    (an interrupted run, or a file from before results were kept whole) is decomposed now, without writing. A
    series of one or two heights gives its :class:`ImagingAnalysis` (computed now: it takes milliseconds)."""
    record = session.read_analysis_result(name)
    if record is not None:
        return SeriesAnalysis.from_record(record.scalars, record.arrays)
    return analyse_session_series(session, name, write=False)


def stored_thermal_fit(record, *, f0_guess_hz: float | None = None):
    """Refit the thermal spectrum kept with a stored calibration record (its averaged spectrum and how it was
    averaged), so that a figure or another conversion starts from the fit the calibration came from; a
    :class:`~assistant.analysis.calibration.ThermalFit`. ``f0_guess_hz``: start there instead of searching."""
    # here: the series analyses need neither the thermal fit nor its spectra module
    from assistant.analysis.calibration import WelchSpectrum, fit_thermal_spectrum

    s, a = record.scalars, record.arrays
    f = a["spectrum_frequency_hz"]
    # a one-sided spectrum runs from 0 to Nyquist in segment_length / 2 + 1 bins
    spectrum = WelchSpectrum(f, a["spectrum_psd_v2_per_hz"],
                             rate_hz=float(s.get("spectrum_rate_hz", 2.0 * f[-1])),
                             segment_length=int(s.get("spectrum_segment_length", 2 * (f.size - 1))),
                             n_segments=int(s["spectrum_segments"]),
                             variance_inflation=float(s.get("spectrum_variance_inflation", 1.0)))
    return fit_thermal_spectrum(spectrum.frequencies_hz, spectrum.psd_v2_per_hz, averages=spectrum.n_segments,
                                variance_inflation=spectrum.variance_inflation, spectrum=spectrum,
                                f0_guess_hz=f0_guess_hz)


def storage_form(d: dict) -> tuple[dict, dict]:
    """Split a result dict into scalar attributes and array datasets for the session file (None, text lists and
    empty lists dropped: an empty list of notes is no array)."""
    scalars, arrays = {}, {}
    for key, value in d.items():
        if value is None or (isinstance(value, (list, tuple)) and not value):
            continue
        if isinstance(value, dict) or (isinstance(value, (list, tuple)) and any(isinstance(v, dict) for v in value)):
            scalars[key] = json.dumps(value)  # nested records (tip models, assumed values) as JSON text
        elif isinstance(value, (list, tuple, np.ndarray)):
            arr = np.asarray(value, dtype=float) if not _is_text(value) else None
            if arr is not None:
                arrays[key] = arr
        elif isinstance(value, (bool, np.bool_)):
            scalars[key] = int(value)
        elif isinstance(value, (int, float, str, np.number)):
            scalars[key] = value
    return scalars, arrays


def _is_text(value) -> bool:
    flat = np.asarray(value, dtype=object).ravel()
    return any(isinstance(v, str) or v is None for v in flat)


def analyse_session_file(path: Path, name: str | None, *, short_range_fraction: float = 0.1, edge: str = "auto"):
    from assistant.storage.session_file import SessionFile

    with SessionFile.open(path, "r") as sf:
        return analyse_session_series(sf, name, short_range_fraction=short_range_fraction, write=False, edge=edge)


NPZ_REQUIRED = ("phase_deg", "heights_nm", "pixel_nm")
NPZ_OPTIONAL = ("bias_v", "spring_constant_n_per_m", "quality_factor", "tip_radius_nm", "amplitude_nm",
                "gap_offset_nm", "repeat_phase_deg", "temperature_k", "resonance_hz", "bandwidth_hz",
                "phase_reference_std_deg")


def _pixel_m(value, path: Path) -> float | tuple[float, float]:
    """``pixel_nm``: one spacing for square pixels, or [between lines, along a line] in nm."""
    v = np.atleast_1d(np.asarray(value, dtype=float))
    if v.size not in (1, 2) or not np.all(np.isfinite(v)) or np.any(v <= 0):
        raise SeriesInputError(f"{path}: pixel_nm must be one positive spacing or [row, column] spacings in nm, "
                               f"got {v.tolist()}")
    return float(v[0]) * 1e-9 if v.size == 1 else (float(v[0]) * 1e-9, float(v[1]) * 1e-9)


def analyse_npz(path: Path, *, short_range_fraction: float = 0.1, edge: str = "auto"):
    """Analyse a stack stored as .npz (keys: see :data:`NPZ_REQUIRED` and :data:`NPZ_OPTIONAL`)."""
    try:
        z = np.load(path, allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise SeriesInputError(f"{path}: not a readable .npz file ({exc})") from None
    with z:
        missing = [k for k in NPZ_REQUIRED if k not in z.files]
        if missing:
            raise SeriesInputError(f"{path}: missing key(s) {', '.join(missing)}")
        unknown = [k for k in z.files if k not in NPZ_REQUIRED + NPZ_OPTIONAL]
        if unknown:
            raise SeriesInputError(f"{path}: unknown key(s) {', '.join(unknown)} "
                                   f"(allowed: {', '.join(NPZ_REQUIRED + NPZ_OPTIONAL)})")
        get = {k: z[k] for k in z.files}

    def scalar(key: str, factor: float = 1.0):
        return float(get[key]) * factor if key in get else None

    fields = {
        "spring_constant_n_per_m": scalar("spring_constant_n_per_m"), "quality_factor": scalar("quality_factor"),
        "tip_radius_m": scalar("tip_radius_nm", 1e-9) or DEFAULT_TIP_RADIUS_M,
        "amplitude_m": scalar("amplitude_nm", 1e-9), "gap_offset_m": scalar("gap_offset_nm", 1e-9),
        "temperature_k": scalar("temperature_k"), "resonance_hz": scalar("resonance_hz"),
        "bandwidth_hz": scalar("bandwidth_hz"), "phase_reference_std_deg": scalar("phase_reference_std_deg"),
    }
    probe = ProbeModel(**{k: v for k, v in fields.items() if v is not None})
    return analyse_series(np.asarray(get["phase_deg"], dtype=float),
                          heights_m=np.asarray(get["heights_nm"], dtype=float) * 1e-9,
                          pixel_m=_pixel_m(get["pixel_nm"], path),
                          bias_v=np.asarray(get["bias_v"], dtype=float) if "bias_v" in get else None,
                          repeat_phase_deg=get.get("repeat_phase_deg"), probe=probe,
                          short_range_fraction=short_range_fraction, edge=edge)
