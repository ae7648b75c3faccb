"""Quantitative MFM steps on stored data: calibrate the tip on a reference image, map a sample's stray field.

Used by ``mfma analyze tip``, ``mfma analyze field``, ``mfma run --field-map`` and the terminal UI. Which TTF
may serve which image (:func:`check_tip`): the TTF must come from the same probe, and no calibration of the probe
may lie between the TTF and the image — a calibration marks a possible change of the probe (remounted, a new
tip). The one exception is the calibration at the start of the session that recorded the image: it is accepted
when it found the probe unchanged against the calibration the TTF was made under (k and f0 within the probe
record's change limits). An image from a .npz file carries no time, so there any later calibration refuses it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from assistant.analysis.constants import MU_0_N_PER_A2
from assistant.formatting import quantity
from assistant.procedures.quantitative_inputs import ImageInput, QuantitativeInputError, load_image
from assistant.storage.quantitative_files import (TipFile, parse_utc, read_tip_file, write_field_file,
                                                  write_tip_file)


@dataclass(frozen=True)
class TipResult:
    """What :func:`calibrate_tip_file` made: the summary (JSON numbers), the calibration and its image."""

    summary: dict
    calibration: object
    image: ImageInput


@dataclass(frozen=True)
class FieldResult:
    summary: dict
    field_map: object
    image: ImageInput
    tip: TipFile


def _bad(exc: Exception, what: str) -> QuantitativeInputError:
    return QuantitativeInputError(f"{what}: {exc}")


def calibrate_tip_file(reference: str | Path, *, ms_a_per_m: float, thickness_m: float, out: str | Path,
                       ms_std_a_per_m: float | None = None, thickness_std_m: float | None = None,
                       tip_moment: str = "up", probe: str | None = None, record=None,
                       plane_std_m: float = 0.0) -> TipResult:
    """Calibrate the TTF on a reference image (.npz or session file), write the tip file, store it for ``probe``."""
    from assistant.analysis.quantitative import CalibrationInputError, calibrate_tip

    for name, v in (("Ms", ms_a_per_m), ("thickness", thickness_m)):
        if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise QuantitativeInputError(f"the reference's {name} must be a finite number > 0, got {v!r}")
    image = load_image(reference)
    if probe and image.probe and image.probe != probe:
        raise QuantitativeInputError(f"{reference} was measured with probe {image.probe!r}, not {probe!r}")
    try:
        cal = calibrate_tip(image.gradient_n_per_m, pixel_m=image.pixel_m, ms_a_per_m=ms_a_per_m,
                            thickness_m=thickness_m, plane_m=image.plane_m, ms_std_a_per_m=ms_std_a_per_m,
                            thickness_std_m=thickness_std_m, tip_moment=tip_moment, amplitude_m=image.amplitude_m,
                            plane_std_m=plane_std_m)
    except (CalibrationInputError, ValueError) as exc:
        raise _bad(exc, str(reference)) from None
    probe_name = probe or image.probe
    summary = write_tip_file(out, cal, gradient_n_per_m=image.gradient_n_per_m, pixel_m=image.pixel_m,
                             spring_constant_n_per_m=image.spring_constant_n_per_m,
                             quality_factor=image.quality_factor,
                             spring_constant_std_n_per_m=image.spring_constant_std_n_per_m,
                             quality_factor_std=image.quality_factor_std, probe=probe_name,
                             reference=image.source)
    summary["tip_file"] = str(out)
    summary["notes"] = list(image.notes)
    if probe and record is not None:
        entry = {key: summary.get(key) for key in ("band_nm", "regularization", "dipole_a_m2", "dipole_std_a_m2",
                                                   "monopole_a_m", "monopole_std_a_m", "offset_nm", "offset_std_nm",
                                                   "point_probe_determined", "measurement_plane_nm", "pixel_nm",
                                                   "ms_ka_per_m", "thickness_nm", "tip_moment")}
        entry.update(reference=image.source, created_utc=summary["created_utc"],
                     calibration=_calibration_ref(record, probe, image))
        stored = record.add_tip_transfer(probe, out, entry)
        summary["probe_record_file"] = str(record.tip_transfer_file(stored))
    return TipResult(summary, cal, image)


def _calibration_ref(record, probe: str, image: ImageInput) -> dict | None:
    """The calibration the TTF is made under: the image's session calibration, else the probe's latest one."""
    cal = image.calibration if image.calibration and image.probe == probe else None
    if cal is None:
        history = record.history(probe)
        cal = history[-1] if history else None
    if cal is None:
        return None
    return {k: cal.get(k) for k in ("calibrated_utc", "recorded_utc", "k_n_per_m", "k_std_n_per_m", "f0_hz",
                                    "f0_std_hz")}


def _when(cal: dict | None):
    if not cal:
        return None
    return parse_utc(cal.get("calibrated_utc")) or parse_utc(cal.get("recorded_utc"))


def check_tip(tip: TipFile, image: ImageInput, record=None) -> list[str]:
    """Refuse a TTF that does not belong to this image (module docstring); returns notes when it is accepted."""
    notes: list[str] = []
    if tip.probe and image.probe and tip.probe != image.probe:
        raise QuantitativeInputError(f"the TTF in {tip.path} is from probe {tip.probe!r}; the image was measured "
                                     f"with probe {image.probe!r}")
    made = tip.created
    if not tip.probe or made is None or record is None:
        if not tip.probe:
            notes.append("the tip file names no probe: whether it belongs to this image's probe is not checked")
        return notes
    own = image.calibration if image.probe == tip.probe else None
    own_time = _when(own)
    for cal in record.history(tip.probe):
        when = _when(cal)
        if when is None or when <= made:
            continue
        if own_time is not None and abs((when - own_time).total_seconds()) < 1.0:
            continue                       # the image's own session calibration: judged below
        if own_time is None or when < own_time:
            raise QuantitativeInputError(
                f"the TTF of probe {tip.probe!r} from {made.isoformat()} is older than the probe's calibration of "
                f"{when.isoformat()}: calibrate the tip again on the reference (mfma analyze tip)")
    if own_time is not None and own_time > made:
        base = _tip_calibration(tip, record)
        if base is None:
            raise QuantitativeInputError(
                f"the TTF of probe {tip.probe!r} from {made.isoformat()} was made with no calibration of the probe on "
                f"record, so the calibration of {own_time.isoformat()} cannot show the probe unchanged: calibrate "
                "the tip again on the reference")
        warnings = record.changes(tip.probe, base, own)
        if warnings:
            raise QuantitativeInputError(
                f"the TTF of probe {tip.probe!r} from {made.isoformat()} is older than the probe's calibration of "
                f"{own_time.isoformat()}, which found the probe changed ({warnings[0].split(': ', 1)[-1]}): "
                "calibrate the tip again on the reference")
        notes.append(f"the probe was calibrated again at the start of this session ({own_time.isoformat()}) and "
                     "found unchanged since the TTF was made")
    return notes


def _tip_calibration(tip: TipFile, record) -> dict | None:
    for entry in reversed(record.tip_transfers(tip.probe)):
        if parse_utc(entry.get("created_utc")) == tip.created and entry.get("calibration"):
            return entry["calibration"]
    made = tip.created
    older = [c for c in record.history(tip.probe) if (_when(c) or made) <= made]
    return older[-1] if older else None


def resolve_tip(*, tip_path: str | Path | None, probe: str | None, record=None) -> TipFile:
    """The tip file named by ``--tip``, or the newest TTF stored for ``--probe``."""
    from assistant.storage.quantitative_files import QuantitativeFileError

    if tip_path is not None:
        try:
            return read_tip_file(tip_path)
        except QuantitativeFileError as exc:
            raise QuantitativeInputError(str(exc)) from None
    if record is None or not probe:
        raise QuantitativeInputError("give --tip TIP.npz or --probe NAME")
    entries = record.tip_transfers(probe)
    if not entries:
        raise QuantitativeInputError(f"no TTF stored for probe {probe!r}: calibrate it on a reference first "
                                     f"(mfma analyze tip REF --probe {probe} ...)")
    try:
        return read_tip_file(record.tip_transfer_file(entries[-1]))
    except QuantitativeFileError as exc:
        raise QuantitativeInputError(f"the stored TTF of probe {probe!r}: {exc}") from None


def _calibration_rel_std(tip: TipFile, image: ImageInput, notes: list[str]) -> float:
    """Relative uncertainty of the image's force-gradient scale over the reference's: k/Q for a phase image, k
    for a frequency-shift image (its Q is NaN: F' does not involve it); zero when both come from one
    calibration and one kind of signal."""
    sides = ((tip["spring_constant_n_per_m"], tip["quality_factor"], tip.get("spring_constant_std_n_per_m"),
              tip.get("quality_factor_std")),
             (image.spring_constant_n_per_m, image.quality_factor, image.spring_constant_std_n_per_m,
              image.quality_factor_std))
    (k_ref, q_ref, _, _), (k_img, q_img, _, _) = sides
    same_q = (not math.isfinite(q_ref) and not math.isfinite(q_img)) or math.isclose(q_ref, q_img, rel_tol=1e-9)
    if math.isclose(k_ref, k_img, rel_tol=1e-9) and same_q:
        return 0.0
    parts, unstated = [], False
    for k, q, ks, qs in sides:
        for value, std in ((k, ks), (q, qs)) if math.isfinite(q) else ((k, ks),):
            if std is None or not math.isfinite(std):
                unstated = True
                continue
            parts.append(std / value)
    if unstated:
        notes.append("k or Q has no stated uncertainty: their part of the map's uncertainty is left out")
    return float(math.sqrt(sum(p * p for p in parts)))


def _spacing(pixel_m: tuple[float, float]) -> str:
    """Pixel spacing for a person: one value when square, else between lines × along a line."""
    if pixel_m[0] == pixel_m[1]:
        return quantity(pixel_m[1], "m")
    return f"{quantity(pixel_m[0], 'm')} × {quantity(pixel_m[1], 'm')}"


def map_field(image: ImageInput, tip: TipFile, *, height_m: float | None = None, draws: int = 64,
              seed: int = 0, plane_std_m: float = 0.0):
    """Hz of ``image`` with the TTF of ``tip`` (the analysis ``reconstruct_field``), with the notes it needs.
    ``plane_std_m``: standard uncertainty of the image's measurement plane; the tip file holds the reference's."""
    from assistant.analysis.quantitative import FieldInputError, reconstruct_field

    notes = list(image.notes)
    tip_pixel = tuple(np.asarray(tip["pixel_nm"], dtype=float) * 1e-9)
    if any(abs(a / b - 1.0) > 1e-6 for a, b in zip(tip_pixel, image.pixel_m)):
        notes.append(f"the TTF was measured with {_spacing(tip_pixel)} pixels, the image has "
                     f"{_spacing(image.pixel_m)}: its profile is resampled in spatial frequency")
    ms = tip["ms_ka_per_m"]
    planes_std = math.hypot(float(tip.get("plane_std_nm", 0.0)) * 1e-9, plane_std_m)
    if not planes_std:
        notes.append("the measurement planes of the reference and of this image are taken as exact (give "
                     "--plane-std-nm to mfma analyze tip and analyze field to count their uncertainty; 2 nm moves "
                     "a map by about 10 %)")
    try:
        fm = reconstruct_field(
            image.gradient_n_per_m, pixel_m=image.pixel_m, plane_m=image.plane_m,
            ring_k_per_m=np.asarray(tip["k_per_m"]), ttf_n_per_a=np.asarray(tip["ttf_n_per_a"]),
            ttf_std_n_per_a=np.asarray(tip["ttf_unc_n_per_a"]), band_k_per_m=tuple(tip["band_k_per_m"]),
            height_m=height_m, ms_rel_std=tip.get("ms_std_ka_per_m", 0.0) / ms,
            thickness_m=tip["thickness_nm"] * 1e-9, thickness_std_m=tip.get("thickness_std_nm", 0.0) * 1e-9,
            calibration_rel_std=_calibration_rel_std(tip, image, notes), amplitude_m=image.amplitude_m,
            ttf_amplitude_m=tip.amplitude_m, ring_correlation=float(tip.get("ring_correlation", 0.0)),
            draws=draws, rng=np.random.default_rng(seed), plane_std_m=planes_std)
    except (FieldInputError, ValueError) as exc:
        raise QuantitativeInputError(str(exc)) from None
    if image.amplitude_m and tip.amplitude_m is None or tip.amplitude_m and image.amplitude_m is None:
        notes.append("the oscillation amplitude is known for only one of the reference and the sample: the TTF is "
                     "used as it is")
    return fm, notes


def field_summary(fm, notes: list[str]) -> dict:
    """The JSON numbers of a field map; statistics over the interior beyond the edge margin. An image with no
    such interior (at most four margins wide) has its statistics over every pixel and no stated uncertainty: the
    map's uncertainty leaves out the reflection at the scan's edges, which reaches every pixel there."""
    hz = fm.hz_a_per_m
    m = fm.margin_px
    interior = not m or min(hz.shape) > 4 * m
    inner = hz[m:hz.shape[0] - m, m:hz.shape[1] - m] if interior else hz
    std = fm.hz_std_a_per_m[m:hz.shape[0] - m, m:hz.shape[1] - m] if interior else None
    warnings = list(fm.warnings)
    if not interior:
        warnings.append(f"the image ({hz.shape[0]} × {hz.shape[1]} px) is small against the edge margin ({m} px): "
                        f"the reflection at its edges reaches every pixel, so its statistics include the edges and "
                        f"no uncertainty is stated; scan at least {4 * m + 1} px across")
    rms = float(np.sqrt(np.mean(inner ** 2)))
    return {"hz_rms_a_per_m": rms, "hz_min_a_per_m": float(inner.min()), "hz_max_a_per_m": float(inner.max()),
            "mu0_hz_rms_mt": MU_0_N_PER_A2 * rms * 1e3,
            "hz_std_median_a_per_m": None if std is None else float(np.median(std)),
            "height_nm": fm.height_m * 1e9, "measurement_plane_nm": fm.plane_m * 1e9,
            "band_nm": [p * 1e9 for p in fm.band_periods_m], "margin_px": m, "statistics_beyond_margin": interior,
            "signal_outside_band": fm.signal_outside_band, "warnings": warnings, "notes": notes}


def map_field_file(image_path: str | Path, *, tip_path: str | Path | None, probe: str | None, out: str | Path,
                   height_m: float | None = None, record=None, plane_std_m: float = 0.0) -> FieldResult:
    """``mfma analyze field``: load, check the TTF, map, write FIELD.npz; returns the summary."""
    tip = resolve_tip(tip_path=tip_path, probe=probe, record=record)
    image = load_image(image_path, wanted_plane_m=height_m)
    notes = check_tip(tip, image, record)
    fm, more = map_field(image, tip, height_m=height_m, plane_std_m=plane_std_m)
    summary = field_summary(fm, notes + more)
    summary.update(field_file=str(out), tip_file=str(tip.path), probe=tip.probe, source=image.source)
    write_field_file(out, fm, extra={"tip_file": str(tip.path), "probe": tip.probe, "source": image.source})
    return FieldResult(summary, fm, image, tip)


def field_map_for_session(session, tip: TipFile, *, series: str | None = None, record=None,
                          height_m: float | None = None, store: bool = True) -> FieldResult:
    """Map the field of a series of an open session file at its recommended height; store it there unless
    ``store`` is false (a session opened read-only)."""
    from assistant.procedures.quantitative_inputs import image_from_session

    image = image_from_session(session, str(session.path), series=series, wanted_plane_m=height_m)
    notes = check_tip(tip, image, record)
    fm, more = map_field(image, tip, height_m=height_m)
    summary = field_summary(fm, notes + more)
    summary.update(tip_file=str(tip.path), probe=tip.probe, source=image.source)
    if store:
        store_field_map(session, image.series, fm, summary, tip)
    return FieldResult(summary, fm, image, tip)


def store_field_map(session, series: str, fm, summary: dict, tip: TipFile) -> None:
    """Write a field map into the session file as ``field_map/<series>``."""
    scalars = {"height_nm": fm.height_m * 1e9, "measurement_plane_nm": fm.plane_m * 1e9,
               "pixel_row_nm": fm.pixel_m[0] * 1e9, "pixel_col_nm": fm.pixel_m[1] * 1e9,
               "band_short_nm": fm.band_periods_m[0] * 1e9, "band_long_nm": fm.band_periods_m[1] * 1e9,
               "margin_px": int(fm.margin_px), "hz_rms_a_per_m": summary["hz_rms_a_per_m"],
               "hz_min_a_per_m": summary["hz_min_a_per_m"], "hz_max_a_per_m": summary["hz_max_a_per_m"],
               "tip_file": str(tip.path), "tip_created_utc": str(tip.get("created_utc", "")),
               "probe": tip.probe or "", "warnings": " | ".join(summary["warnings"]) or "none"}
    session.write_field_map(series, scalars, {"hz_a_per_m": fm.hz_a_per_m, "hz_std_a_per_m": fm.hz_std_a_per_m})
