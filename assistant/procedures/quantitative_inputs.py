"""Second-pass images for quantitative MFM, from a .npz file or a session file, as force-gradient images.

A .npz holds the keys of ``mfma analyze series`` for one image: ``phase_deg`` (rows, cols) with ``lift_nm``, or a
stack (heights, rows, cols) with ``heights_nm`` (optionally (heights, biases, rows, cols) with ``bias_v``);
``pixel_nm`` (one spacing or [row, column]); ``spring_constant_n_per_m`` and ``quality_factor``; optional
``amplitude_nm`` (peak) and ``gap_offset_nm``. ``frequency_shift_hz`` with ``resonance_hz`` may stand in for the
phase; ``spring_constant_std_n_per_m`` and ``quality_factor_std`` add their uncertainties. The other keys of
``analyze series`` (``tip_radius_nm``, ``repeat_phase_deg``, ``temperature_k``, ``bandwidth_hz``) are accepted.

From a stack the image at the recommended lift height is used (the lowest height where the short-range part is
small; from the stored decomposition of a session, else computed), or the lowest height when there is none; from a
bias grid, the pass at the bias nearest the contact potential (where the electrostatic force vanishes).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from assistant.analysis.quantitative import (force_gradient_from_frequency_shift, force_gradient_from_phase,
                                             measurement_plane_m)
from assistant.errors import InputError
from assistant.formatting import quantity


class QuantitativeInputError(InputError):
    """Input that quantitative MFM cannot use; the message names the file and the problem (exit status 2)."""


NPZ_KEYS = ("phase_deg", "frequency_shift_hz", "resonance_hz", "heights_nm", "lift_nm", "pixel_nm",
            "spring_constant_n_per_m", "quality_factor", "amplitude_nm", "gap_offset_nm",
            "spring_constant_std_n_per_m", "quality_factor_std", "bias_v", "tip_radius_nm", "repeat_phase_deg",
            "temperature_k", "bandwidth_hz")


@dataclass
class ImageInput:
    """One force-gradient image and what the quantitative steps need to know about it (SI units)."""

    source: str
    gradient_n_per_m: np.ndarray
    pixel_m: tuple[float, float]
    lift_m: float
    plane_m: float
    amplitude_m: float | None
    spring_constant_n_per_m: float
    quality_factor: float
    spring_constant_std_n_per_m: float | None = None
    quality_factor_std: float | None = None
    probe: str | None = None
    calibration: dict | None = None          # the session's last probe calibration (scalars)
    series: str | None = None
    heights_m: tuple[float, ...] = ()
    notes: list[str] = field(default_factory=list)

    def plane_of(self, lift_m: float) -> float:
        offset = self.plane_m - self.lift_m
        return lift_m + offset


def _positive(value, what: str, path: Path) -> float:
    try:
        v = float(np.asarray(value, dtype=float).reshape(-1)[0]) if np.size(value) == 1 else float("nan")
    except (TypeError, ValueError):
        v = float("nan")
    if not (math.isfinite(v) and v > 0):
        raise QuantitativeInputError(f"{path}: {what} must be one finite number > 0, got {np.asarray(value).tolist()}")
    return v


def _pixel(value, path: Path) -> tuple[float, float]:
    v = np.atleast_1d(np.asarray(value, dtype=float))
    if v.size not in (1, 2) or not np.all(np.isfinite(v)) or np.any(v <= 0):
        raise QuantitativeInputError(f"{path}: pixel_nm must be one positive spacing or [row, column] spacings in "
                                     f"nm, got {v.tolist()}")
    return (v[0] * 1e-9, v[-1] * 1e-9)


def _complete_rows(image: np.ndarray, path: Path) -> np.ndarray:
    """Keep the scan lines without NaN (an interrupted scan); at least 16 x 16 must remain."""
    rows = np.all(np.isfinite(image), axis=-1)
    while rows.ndim > 1:
        rows = np.all(rows, axis=0)
    image = image[..., rows, :]
    if image.shape[-2] < 16 or image.shape[-1] < 16:
        raise QuantitativeInputError(f"{path}: the image needs at least 16 x 16 finite pixels, "
                                     f"has {image.shape[-2]} complete lines of {image.shape[-1]} pixels")
    return image


def _pick(stack: np.ndarray, heights_m: np.ndarray, *, recommended_m: float | None, wanted_plane_m: float | None,
          plane_offset_m: float, notes: list[str]) -> int:
    """Index of the height to use (module docstring; for a field map at ``wanted_plane_m`` the recommended image
    if its plane is not above it, else the highest image whose plane is)."""
    if stack.shape[0] == 1:
        return 0
    best = int(np.argmin(np.abs(heights_m - recommended_m))) if recommended_m is not None else 0
    if recommended_m is None:
        notes.append(f"no recommended lift height: the lowest height ({quantity(heights_m[0], 'm')}) is used")
    if wanted_plane_m is not None and heights_m[best] + plane_offset_m > wanted_plane_m + 1e-12:
        below = np.flatnonzero(heights_m + plane_offset_m <= wanted_plane_m + 1e-12)
        if below.size == 0:
            raise QuantitativeInputError(
                f"height {quantity(wanted_plane_m, 'm')} is below every measurement plane of the series (lowest "
                f"{quantity(heights_m[0] + plane_offset_m, 'm')}): fields can only be continued upwards")
        best = int(below[-1])
        notes.append(f"the image at {quantity(heights_m[best], 'm')} lift is used, below the recommended height, "
                     "because the requested plane is lower: check its short-range part")
    return best


def _recommended(stack, heights_m, pixel_m, *, bias_v, k, q, amplitude_m, gap_offset_m, notes) -> tuple:
    """(recommended lift [m] or None, contact potential [V] or None) from the decomposition of a stack."""
    if stack.shape[0] < 3:
        return None, None
    from assistant.analysis.lift_series import ProbeModel, analyse_series

    fields = {"spring_constant_n_per_m": k, "quality_factor": q, "gap_offset_m": gap_offset_m}
    if amplitude_m:
        fields["amplitude_m"] = amplitude_m
    try:
        result = analyse_series(stack, heights_m=heights_m, pixel_m=pixel_m, bias_v=bias_v,
                                probe=ProbeModel(**fields))
    except (ValueError, RuntimeError, np.linalg.LinAlgError) as exc:
        notes.append(f"the lift-series decomposition failed ({exc}); the lowest height is used")
        return None, None
    return result.recommendation.lift_height_m, result.cpd_v


def _bias_image(stack4: np.ndarray, biases: np.ndarray, cpd_v: float | None, notes: list[str]) -> np.ndarray:
    """(heights, rows, cols) at the bias nearest V_cpd; without V_cpd the one whose images are least attractive."""
    if cpd_v is not None:
        j = int(np.argmin(np.abs(biases - cpd_v)))
    else:
        j = int(np.argmax(np.nanmean(stack4, axis=(0, 2, 3))))
    notes.append(f"bias grid: the passes at {quantity(biases[j], 'V')} are used"
                 + (f" (nearest the contact potential {quantity(cpd_v, 'V')})" if cpd_v is not None else
                    " (the weakest electrostatic attraction)"))
    return stack4[:, j]


def load_npz(path: Path, *, wanted_plane_m: float | None = None) -> ImageInput:
    try:
        with np.load(path, allow_pickle=False) as z:
            d = {k: z[k] for k in z.files}
    except (OSError, ValueError) as exc:
        raise QuantitativeInputError(f"{path}: not a readable .npz file ({exc})") from None
    unknown = sorted(set(d) - set(NPZ_KEYS))
    if unknown:
        raise QuantitativeInputError(f"{path}: unknown key(s) {', '.join(unknown)} (allowed: {', '.join(NPZ_KEYS)})")
    if "pixel_nm" not in d:
        raise QuantitativeInputError(f"{path}: missing key pixel_nm")
    pixel = _pixel(d["pixel_nm"], path)
    k = _positive(d.get("spring_constant_n_per_m", np.nan), "spring_constant_n_per_m", path)
    if "phase_deg" in d:
        q = _positive(d.get("quality_factor", np.nan), "quality_factor", path)
        signal, kind = np.asarray(d["phase_deg"], dtype=float), "phase"
    elif "frequency_shift_hz" in d:
        q = float("nan")  # F' from a frequency shift does not involve Q: NaN tells the steps after it so
        f0 = _positive(d.get("resonance_hz", np.nan), "resonance_hz (needed with frequency_shift_hz)", path)
        signal, kind = np.asarray(d["frequency_shift_hz"], dtype=float), "frequency"
    else:
        raise QuantitativeInputError(f"{path}: missing key phase_deg (or frequency_shift_hz with resonance_hz)")
    if "phase_deg" in d and "frequency_shift_hz" in d and d["frequency_shift_hz"].shape != signal.shape:
        raise QuantitativeInputError(f"{path}: frequency_shift_hz has shape {d['frequency_shift_hz'].shape}, "
                                     f"phase_deg {signal.shape}: the images differ in shape")
    if signal.ndim == 2:
        if "lift_nm" not in d and np.size(d.get("heights_nm", [])) != 1:
            raise QuantitativeInputError(f"{path}: a single image needs lift_nm (its lift height in nm)")
        heights = np.array([_positive(d.get("lift_nm", d.get("heights_nm")), "lift_nm", path) * 1e-9])
        signal = signal[None]
    elif signal.ndim in (3, 4):
        if "heights_nm" not in d:
            raise QuantitativeInputError(f"{path}: a stack of images needs heights_nm")
        heights = np.atleast_1d(np.asarray(d["heights_nm"], dtype=float)) * 1e-9
        if heights.size != signal.shape[0] or not np.all(np.isfinite(heights)) or np.any(heights <= 0):
            raise QuantitativeInputError(f"{path}: heights_nm has {heights.size} positive values, the stack "
                                         f"{signal.shape[0]} images: they must agree")
        if signal.ndim == 4 and np.size(d.get("bias_v", [])) != signal.shape[1]:
            raise QuantitativeInputError(f"{path}: a (heights, biases, rows, cols) stack needs bias_v with "
                                         f"{signal.shape[1]} values")
    else:
        raise QuantitativeInputError(f"{path}: {kind} images must be (rows, cols), (heights, rows, cols) or "
                                     f"(heights, biases, rows, cols); got shape {signal.shape}")
    if "lift_nm" in d and signal.shape[0] > 1:
        raise QuantitativeInputError(f"{path}: lift_nm goes with a single image; a stack takes heights_nm")
    amp = _positive(d["amplitude_nm"], "amplitude_nm", path) * 1e-9 if "amplitude_nm" in d else None
    gap = float(d["gap_offset_nm"]) * 1e-9 if "gap_offset_nm" in d else None
    notes: list[str] = []
    signal = _complete_rows(signal, path)
    plane_offset = measurement_plane_m(1.0, amplitude_m=amp, gap_offset_m=gap) - 1.0
    recommended, cpd = None, None
    if kind == "phase" and signal.shape[0] >= 3:
        recommended, cpd = _recommended(signal, heights, pixel, bias_v=d.get("bias_v"), k=k, q=q, amplitude_m=amp,
                                        gap_offset_m=gap, notes=notes)
    if signal.ndim == 4:
        signal = _bias_image(signal, np.asarray(d["bias_v"], dtype=float), cpd, notes)
    i = _pick(signal, heights, recommended_m=recommended, wanted_plane_m=wanted_plane_m,
              plane_offset_m=plane_offset, notes=notes)
    if kind == "phase":
        grad = force_gradient_from_phase(signal[i], spring_constant_n_per_m=k, quality_factor=q)
    else:
        grad = force_gradient_from_frequency_shift(signal[i], spring_constant_n_per_m=k, resonance_hz=f0)
    std = {key: float(d[key]) if key in d and (kind == "phase" or key.startswith("spring")) else None
           for key in ("spring_constant_std_n_per_m", "quality_factor_std")}
    return ImageInput(source=str(path), gradient_n_per_m=grad, pixel_m=pixel, lift_m=float(heights[i]),
                      plane_m=float(heights[i]) + plane_offset, amplitude_m=amp, spring_constant_n_per_m=k,
                      quality_factor=q, heights_m=tuple(heights), notes=notes, **std)


def load_session(path: Path, *, wanted_plane_m: float | None = None) -> ImageInput:
    """The last series of a session file, with its calibration, drive and stored decomposition."""
    from assistant.storage.session_file import SessionFile

    with SessionFile.open(path, "r") as sf:
        return image_from_session(sf, str(path), wanted_plane_m=wanted_plane_m)


def image_from_session(sf, label: str, *, series: str | None = None,
                       wanted_plane_m: float | None = None) -> ImageInput:
    """Series ``series`` (default: the last) of an open session file, as a force-gradient image."""
    from assistant.procedures.analyse import analyse_session_series, stored_probe

    path = label
    names = sf.series_names()
    if not names:
        raise QuantitativeInputError(f"{path}: the session file holds no series")
    name = series or names[-1]
    if name not in names:
        raise QuantitativeInputError(f"{path}: no series {name!r} (have {', '.join(names)})")
    data = sf.read_series(name)
    cals = sf.read_calibrations()
    analysis = sf.read_analysis(name).scalars if name in sf.analysis_names() else None
    if analysis is None and data.completed_lines >= 8 and len(data.heights_m) >= 3:
        try:
            analysis = analyse_session_series(sf, name, write=False).to_dict()
        except (ValueError, RuntimeError):
            analysis = None
    settings = json.loads(data.settings_json or "{}")
    k, q = settings.get("spring_constant_n_per_m"), settings.get("quality_factor")
    if not k or not q:
        raise QuantitativeInputError(f"{path}: series {name!r} has no spring constant and Q: calibrate first")
    probe = stored_probe(settings)  # amplitude and gap offset of the first pass, as the decomposition takes them
    amp = probe.amplitude_m if (settings.get("drive") or {}).get("free_amplitude_m") else None
    gap = probe.gap_offset_m if amp else None
    pixel = (data.scan_size_m / data.lines, data.scan_size_m / data.pixels)
    notes: list[str] = []
    stack = _complete_rows(np.asarray(data.phase_deg, dtype=float), path)
    cpd = analysis.get("cpd_v") if analysis else None
    if stack.ndim == 4:
        stack = _bias_image(stack, np.asarray(data.biases_v, dtype=float), cpd, notes)
    heights = np.asarray(data.heights_m, dtype=float)
    plane_offset = measurement_plane_m(1.0, amplitude_m=amp, gap_offset_m=gap) - 1.0
    rec = analysis.get("recommended_lift_nm") if analysis else None
    i = _pick(stack, heights, recommended_m=None if rec is None else rec * 1e-9, wanted_plane_m=wanted_plane_m,
              plane_offset_m=plane_offset, notes=notes)
    cal = cals[-1].scalars if cals else None
    return ImageInput(
        source=f"{path} (series {name}, {quantity(heights[i], 'm')} lift)",
        gradient_n_per_m=force_gradient_from_phase(stack[i], spring_constant_n_per_m=k, quality_factor=q),
        pixel_m=pixel, lift_m=float(heights[i]), plane_m=float(heights[i]) + plane_offset,
        amplitude_m=amp, spring_constant_n_per_m=float(k), quality_factor=float(q),
        spring_constant_std_n_per_m=(cal or {}).get("k_std_n_per_m"), quality_factor_std=(cal or {}).get("q_std"),
        probe=(cal or {}).get("probe_name") if (cal or {}).get("probe_name") not in (None, "unnamed") else None,
        calibration=cal, series=name, heights_m=tuple(heights), notes=notes)


def is_hdf5(path: Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(8) == b"\x89HDF\r\n\x1a\n"


def load_image(path: str | Path, *, wanted_plane_m: float | None = None) -> ImageInput:
    """A .npz or a session file (module docstring); :class:`QuantitativeInputError` for anything unusable."""
    p = Path(path)
    if not p.is_file():
        raise QuantitativeInputError(f"file not found: {p}")
    if is_hdf5(p):
        return load_session(p, wanted_plane_m=wanted_plane_m)
    if p.suffix.lower() != ".npz":
        raise QuantitativeInputError(f"{p}: expected a .npz file or a session file (.h5)")
    return load_npz(p, wanted_plane_m=wanted_plane_m)
