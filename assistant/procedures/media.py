"""Media analysis of a stored image: a .npz file or a lift series in a session file.

A .npz holds one image: ``phase_deg`` (rows, cols) [deg], ``pixel_nm`` (one spacing, or [between rows, along a
row]) and optionally ``lift_nm``, ``amplitude_nm`` (the oscillation's peak amplitude) and ``gap_offset_nm`` (the
oscillation centre's height above the lift in the first pass; default: the amplitude, so the lift is the closest
approach). From a session file the image is one height of a series (the first bias of a
bias grid closest to the contact potential): the lowest height where the tip-sample interaction was found
negligible, else the recommended lift height, else the lowest height; the whole stack at that bias gives the
orientation its per-height evidence; the free amplitude and the first pass's gap offset are the series' own.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from assistant.errors import InputError
from assistant.formatting import number_list, quantity

__all__ = ["MediaImageError", "StoredImage", "load_image", "analyse_image", "closest_approach_m"]

NPZ_REQUIRED = ("phase_deg", "pixel_nm")
NPZ_OPTIONAL = ("lift_nm", "amplitude_nm", "gap_offset_nm")


class MediaImageError(InputError):
    """The file holds no usable image (missing keys, wrong shape, no such series or height)."""


@dataclass(frozen=True)
class StoredImage:
    phase_deg: np.ndarray            # (rows, cols)
    pixel_m: tuple[float, float]     # (between rows, along a row)
    lift_m: float | None
    source: str                      # what was read, in words
    stack_deg: np.ndarray | None = None   # (heights, rows, cols) at the same bias, for the orientation
    heights_m: np.ndarray | None = None
    amplitude_m: float | None = None      # peak amplitude of the oscillation
    gap_offset_m: float | None = None     # the oscillation centre above the lift height (default: the amplitude)


def _pixel_pair(value, path) -> tuple[float, float]:
    v = np.atleast_1d(np.asarray(value, dtype=float))
    if v.size not in (1, 2) or not np.all(np.isfinite(v)) or np.any(v <= 0):
        raise MediaImageError(f"{path}: pixel_nm must be one positive spacing or [row, column] spacings in nm, "
                              f"got {v.tolist()}")
    return (float(v[0]) * 1e-9, float(v[-1]) * 1e-9)


def _from_npz(path: Path) -> StoredImage:
    try:
        z = np.load(path, allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise MediaImageError(f"{path}: not a readable .npz file ({exc})") from None
    with z:
        missing = [k for k in NPZ_REQUIRED if k not in z.files]
        if missing:
            raise MediaImageError(f"{path}: missing key(s) {', '.join(missing)} (an image needs phase_deg (rows, "
                                  "cols) and pixel_nm; lift_nm is optional)")
        unknown = [k for k in z.files if k not in NPZ_REQUIRED + NPZ_OPTIONAL]
        if unknown:
            raise MediaImageError(f"{path}: unknown key(s) {', '.join(unknown)} (allowed: "
                                  f"{', '.join(NPZ_REQUIRED + NPZ_OPTIONAL)})")
        phase = np.asarray(z["phase_deg"], dtype=float)
        if phase.ndim != 2:
            raise MediaImageError(f"{path}: phase_deg must be one image (rows, cols), got shape {phase.shape}")
        lift, amp, gap = (_length(z, key, path) for key in NPZ_OPTIONAL)
        return StoredImage(phase, _pixel_pair(z["pixel_nm"], path), lift, f"{path.name}", amplitude_m=amp,
                           gap_offset_m=gap)


def _length(z, key: str, path: Path) -> float | None:
    """An optional length >= 0 in nm from the .npz, in metres."""
    if key not in z.files:
        return None
    raw = np.asarray(z[key])
    if raw.ndim != 0 or raw.dtype.kind not in "iuf":
        raise MediaImageError(f"{path}: {key} must be one number in nm, got "
                              f"{'an array of shape ' + str(raw.shape) if raw.ndim else raw.dtype.name}")
    value = float(raw)
    if not (np.isfinite(value) and value >= 0):
        raise MediaImageError(f"{path}: {key} must be >= 0 nm, got {quantity(value, 'nm')}")
    return value * 1e-9


def _from_session(path: Path, series: str | None, height_nm: float | None) -> StoredImage:
    from assistant.storage.session_file import SessionFile

    with SessionFile.open(path, "r") as sf:
        names = sf.series_names()
        if not names:
            raise MediaImageError(f"{path}: the session file holds no series")
        name = series or names[-1]
        if name not in names:
            raise MediaImageError(f"{path}: no series {name!r} (have: {', '.join(names)})")
        data = sf.read_series(name)
        stored = sf.read_analysis(name) if name in sf.analysis_names() else None
    if data.completed_lines < 16:
        raise MediaImageError(f"{path}: series {name!r} has {data.completed_lines} completed lines; need 16")
    lines = data.completed_lines
    phase = np.asarray(data.phase_deg, float)
    h = np.asarray(data.heights_m, float)
    b = 0
    if data.biases_v is not None:
        cpd = None if stored is None else stored.scalars.get("cpd_v")
        b = int(np.argmin(np.abs(np.asarray(data.biases_v) - (cpd if cpd is not None else 0.0))))
        phase = phase[:, b]
    if height_nm is not None:
        i = int(np.argmin(np.abs(h * 1e9 - height_nm)))
        if abs(h[i] * 1e9 - height_nm) > 1e-3 * max(height_nm, 1.0):
            raise MediaImageError(f"{path}: no height {quantity(height_nm, 'nm')} in series {name!r} (have: "
                                  f"{number_list(np.round(h * 1e9, 6), 'nm')})")
        why = "as asked"
    else:
        i, why = _chosen_height(h, stored)
    pixel = (data.scan_size_m / data.lines, data.scan_size_m / data.pixels)
    bias = "" if data.biases_v is None else f", tip bias {quantity(data.biases_v[b], 'V', digits=3)}"
    source = f"{path.name}, series {name!r} at {quantity(h[i], 'm')} ({why}){bias}, {lines} lines"
    amp, gap = _stored_oscillation(data.settings_json)
    return StoredImage(phase[i, :lines], pixel, float(h[i]), source, phase[:, :lines], h, amp, gap)


def _stored_oscillation(settings_json: str | None) -> tuple[float | None, float | None]:
    """The free amplitude and the first pass's gap offset the workflow stored beside the series (None without)."""
    import json

    from assistant.procedures.analyse import stored_probe

    settings = json.loads(settings_json or "{}")
    if not (settings.get("drive") or {}).get("free_amplitude_m"):
        return None, None
    probe = stored_probe(settings)
    return probe.amplitude_m, probe.gap_offset_m


def _chosen_height(h: np.ndarray, stored) -> tuple[int, str]:
    if stored is not None:
        ok = stored.arrays.get("interaction_negligible")
        if ok is not None and np.size(ok) == h.size and np.any(np.asarray(ok) > 0.5):
            return (int(np.argmax(np.asarray(ok) > 0.5)),
                    "the lowest height where the tip-sample interaction is negligible")
        rec = stored.scalars.get("recommended_lift_nm")
        if rec is not None:
            return int(np.argmin(np.abs(h * 1e9 - float(rec)))), "the recommended lift height"
    return 0, "the lowest height"


def load_image(path: str | Path, *, series: str | None = None, height_nm: float | None = None) -> StoredImage:
    """The image to analyse from a .npz or a session file (see the module docstring)."""
    p = Path(path)
    if not p.is_file():
        raise MediaImageError(f"file not found: {p}")
    with open(p, "rb") as fh:
        hdf5 = fh.read(8) == b"\x89HDF\r\n\x1a\n"
    if hdf5:
        return _from_session(p, series, height_nm)
    if p.suffix.lower() != ".npz":
        raise MediaImageError(f"{p}: expected an image .npz or a session .h5 file")
    if series is not None or height_nm is not None:
        raise MediaImageError("--series and --height-nm apply to session files only")
    return _from_npz(p)


def analyse_image(image: StoredImage, *, thickness_m: float | None = None, tip_offset_m: float | None = None,
                  amplitude_m: float | None = None):
    """Orientation and recorded-track metrics of a stored image (a frozen ``TrackAnalysis``).

    With a series stack, the orientation is read from every height (the phase relation per height and the
    fundamental's decay) along the track direction the image gave. ``tip_offset_m`` describes the tip as a point
    dipole that far behind the apex (a quantitative-MFM calibration's offset), which takes the tip off the
    transition width. ``amplitude_m`` (else the image's own) is the oscillation's peak amplitude: its averaging
    enters the response, and the lift is moved to the closest approach (lift + gap offset - amplitude).
    """
    from assistant.analysis.media import analyse_tracks, magnetisation_orientation, point_probe_transfer

    tip = None if tip_offset_m is None else point_probe_transfer(offset_m=tip_offset_m)
    amp = image.amplitude_m if amplitude_m is None else amplitude_m
    result = analyse_tracks(image.phase_deg, pixel_m=image.pixel_m, lift_m=closest_approach_m(image, amp),
                            thickness_m=thickness_m, tip_transfer=tip, amplitude_m=amp)
    if image.stack_deg is not None and image.stack_deg.shape[0] > 1:
        axis = (1 if result.tracks_along_rows else 0) if result.has_tracks else None
        series_orientation = magnetisation_orientation(image.stack_deg, pixel_m=image.pixel_m,
                                                       heights_m=image.heights_m, axis=axis)
        if series_orientation.orientation != "undetermined" or result.orientation.orientation == "undetermined":
            result = replace(result, orientation=series_orientation)
    return result


def closest_approach_m(image: StoredImage, amplitude_m: float | None) -> float | None:
    """The measurement plane: lift + gap offset - amplitude (the gap offset defaulting to the amplitude; the
    quantitative family's ``measurement_plane_m``), None without a lift height."""
    if image.lift_m is None:
        return None
    if not amplitude_m:
        return image.lift_m
    from assistant.analysis.quantitative import measurement_plane_m

    gap = image.gap_offset_m if image.gap_offset_m is not None else amplitude_m
    try:
        return measurement_plane_m(image.lift_m, amplitude_m=amplitude_m, gap_offset_m=gap)
    except ValueError:
        raise MediaImageError(f"the closest approach lift + gap offset - amplitude = "
                              f"{quantity(image.lift_m + gap - amplitude_m, 'm')} must be > 0") from None
