"""Run the lift-series decomposition on stored data (a session file or a .npz stack) and store the result."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from assistant.procedures.events import Notice, Sink, null_sink

DEFAULT_TIP_RADIUS_M = 30e-9  # nominal apex radius of a magnetic-coated tip; a setting, not a measurement


class SeriesInputError(ValueError):
    """The stored series cannot be analysed (missing keys, too few completed lines)."""


def _probe_inputs(settings: dict) -> dict:
    drive = settings.get("drive") or {}
    amp = drive.get("free_amplitude_m")
    ratio = drive.get("setpoint_ratio")
    out = {"spring_constant_n_per_m": settings.get("spring_constant_n_per_m"),
           "quality_factor": settings.get("quality_factor"),
           "temperature_k": settings.get("temperature_k") or 295.15,
           "resonance_hz": drive.get("frequency_hz")}
    if amp:
        out["amplitude_m"] = float(amp)
        if ratio:
            # First pass: the feedback holds the oscillation centre one setpoint amplitude above the surface.
            out["gap_offset_m"] = float(amp) * float(ratio)
    return out


def analyse_arrays(phase_deg: np.ndarray, *, heights_m, pixel_m: float | tuple[float, float], bias_v=None,
                   repeat_phase_deg=None, line_rate_hz: float | None = None, pixels: int | None = None,
                   short_range_fraction: float = 0.1, edge: str = "auto", **probe):
    from assistant.analysis.series import analyse_series

    bandwidth = None
    if line_rate_hz and pixels:
        bandwidth = 0.5 * line_rate_hz * pixels  # one pixel dwell 1/(rate*pixels): Nyquist bandwidth
    kwargs = {k: v for k, v in probe.items() if v is not None}
    kwargs.setdefault("tip_radius_m", DEFAULT_TIP_RADIUS_M)
    return analyse_series(np.asarray(phase_deg, dtype=float), heights_m=np.asarray(heights_m, dtype=float),
                          pixel_m=pixel_m,  # a (row, column) pair: lines and pixels may differ
                          bias_v=None if bias_v is None else np.asarray(bias_v, dtype=float),
                          repeat_phase_deg=repeat_phase_deg, bandwidth_hz=bandwidth,
                          short_range_fraction=short_range_fraction, edge=edge, **kwargs)


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
    from assistant.analysis.imaging import DECOMPOSITION_MIN_HEIGHTS

    if data.heights_m.size < DECOMPOSITION_MIN_HEIGHTS:  # one or two heights: what they tell, no decomposition
        result = analyse_imaging_series(data, _probe_inputs(settings))
    else:
        result = analyse_arrays(data.phase_deg, heights_m=data.heights_m,
                                pixel_m=(data.scan_size_m / data.lines, data.scan_size_m / data.pixels),
                                bias_v=data.biases_v, repeat_phase_deg=data.repeat_phase_deg,
                                line_rate_hz=data.line_rate_hz, pixels=data.pixels,
                                short_range_fraction=short_range_fraction, edge=edge, **_probe_inputs(settings))
    if write:
        scalars, arrays = storage_form(result.to_dict())
        session.write_analysis(name, scalars, arrays)
    for text in getattr(result, "messages", ()):
        sink(Notice("info", text))
    return result


def analyse_imaging_series(data, probe: dict):
    """One or two lift heights (a ``SeriesData``): image statistics, noise, repeat check, V_cpd of a bias grid."""
    from assistant.analysis.imaging import analyse_imaging

    keep = ("spring_constant_n_per_m", "quality_factor", "resonance_hz", "amplitude_m", "temperature_k")
    return analyse_imaging(data.phase_deg, heights_m=data.heights_m, bias_v=data.biases_v,
                           repeat_phase_deg=data.repeat_phase_deg,
                           bandwidth_hz=0.5 * data.line_rate_hz * data.pixels,  # Nyquist of one pixel's dwell
                           **{k: probe[k] for k in keep if probe.get(k) is not None})


def storage_form(d: dict) -> tuple[dict, dict]:
    """Split a result dict into scalar attributes and array datasets for the session file (None dropped)."""
    scalars, arrays = {}, {}
    for key, value in d.items():
        if value is None:
            continue
        if isinstance(value, (list, tuple, np.ndarray)):
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
                "gap_offset_nm", "repeat_phase_deg", "temperature_k", "resonance_hz", "bandwidth_hz")


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

    from assistant.analysis.series import analyse_series

    kwargs = {
        "spring_constant_n_per_m": scalar("spring_constant_n_per_m"), "quality_factor": scalar("quality_factor"),
        "tip_radius_m": scalar("tip_radius_nm", 1e-9) or DEFAULT_TIP_RADIUS_M,
        "amplitude_m": scalar("amplitude_nm", 1e-9), "gap_offset_m": scalar("gap_offset_nm", 1e-9),
        "temperature_k": scalar("temperature_k"), "resonance_hz": scalar("resonance_hz"),
        "bandwidth_hz": scalar("bandwidth_hz"),
    }
    kwargs = {k: v for k, v in kwargs.items() if v is not None}
    return analyse_series(np.asarray(get["phase_deg"], dtype=float),
                          heights_m=np.asarray(get["heights_nm"], dtype=float) * 1e-9,
                          pixel_m=_pixel_m(get["pixel_nm"], path),
                          bias_v=np.asarray(get["bias_v"], dtype=float) if "bias_v" in get else None,
                          repeat_phase_deg=get.get("repeat_phase_deg"),
                          short_range_fraction=short_range_fraction, edge=edge, **kwargs)
