"""Files of quantitative MFM: the tip file (a calibrated TTF, ``mfma analyze tip --out TIP.npz``) and the field file
(``mfma analyze field --out FIELD.npz``). Both are plain ``.npz`` archives (``numpy.load(path)`` reads them, no
pickles): arrays in SI units or with the unit in the key, text as 0-d string arrays.

Tip file keys: ``format`` ("mfm-assistant-tip-transfer"), ``version``; the TTF profile per ring ``k_per_m``,
``ttf_n_per_a`` (NaN outside the valid band), ``ttf_unc_n_per_a`` (the uncertainty the field map uses),
``ttf_raw_n_per_a`` and ``ttf_raw_std_n_per_a`` (before the bias correction), ``snr``, ``in_band``, ``bias_rel``;
``band_nm`` [shortest, longest period], ``band_k_per_m``, ``ring_correlation``; the inputs ``pixel_nm`` [row, column],
``measurement_plane_nm``, ``amplitude_nm`` (NaN when unknown), ``ms_ka_per_m``, ``ms_std_ka_per_m``,
``thickness_nm``, ``thickness_std_nm``, ``tip_moment``, ``spring_constant_n_per_m``, ``quality_factor`` and their
``*_std``; ``probe`` ("" when none), ``created_utc``, ``reference``; the point-probe numbers (``dipole_a_m2``,
``monopole_a_m``, ``offset_nm`` with ``*_std``, ``point_probe_determined``, ``point_probe_model``,
``point_probe_verdict``), ``regularization``; and for the figures the reference image ``gradient_n_per_m``, its
pattern before and after refinement, its field ``hz_reference_a_per_m`` and the regularised 2-D TTF
(``ttf_2d_real_n_per_a``, ``ttf_2d_imag_n_per_a``, rfft2 half plane).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from assistant.errors import AssistantError

TIP_FORMAT = "mfm-assistant-tip-transfer"
TIP_VERSION = 1
_TIP_REQUIRED = ("format", "version", "k_per_m", "ttf_n_per_a", "ttf_unc_n_per_a", "band_k_per_m", "pixel_nm",
                 "measurement_plane_nm", "ms_ka_per_m", "thickness_nm")


class QuantitativeFileError(AssistantError, ValueError):
    """A tip or field file that cannot be read or written; the message names the file and the problem."""


@dataclass(frozen=True)
class TipFile:
    """A tip file as read back: ``values`` holds every key (arrays as arrays, scalars as Python values)."""

    path: Path
    values: dict[str, Any]

    def __getitem__(self, key: str) -> Any:
        return self.values[key]

    def get(self, key: str, default: Any = None) -> Any:
        return self.values.get(key, default)

    @property
    def probe(self) -> str | None:
        return self.values.get("probe") or None

    @property
    def created(self) -> datetime | None:
        return parse_utc(self.values.get("created_utc"))

    @property
    def amplitude_m(self) -> float | None:
        a = self.values.get("amplitude_nm")
        return None if a is None or not math.isfinite(a) else a * 1e-9

    @property
    def band_periods_nm(self) -> tuple[float, float]:
        lo, hi = self.values["band_k_per_m"]
        return 2e9 * math.pi / hi, 2e9 * math.pi / lo


def parse_utc(text: Any) -> datetime | None:
    """An ISO 8601 time stamp (``...Z`` or ``+00:00``) as an aware UTC datetime; None if absent or unreadable."""
    if not isinstance(text, str) or not text:
        return None
    try:
        t = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        return None
    return t if t.tzinfo else t.replace(tzinfo=timezone.utc)


def utc_now_text(now: datetime | None = None) -> str:
    return (now or datetime.now(timezone.utc)).astimezone(timezone.utc).isoformat(timespec="seconds").replace(
        "+00:00", "Z")


def write_tip_file(path: str | os.PathLike[str], calibration, *, gradient_n_per_m: np.ndarray,
                   pixel_m: tuple[float, float], spring_constant_n_per_m: float, quality_factor: float,
                   spring_constant_std_n_per_m: float | None, quality_factor_std: float | None,
                   probe: str | None, reference: str, now: datetime | None = None) -> dict[str, Any]:
    """Write a :class:`TipCalibration` and its inputs as a tip file; returns the summary (JSON values)."""
    t = calibration.transfer
    summary = calibration.to_dict()
    created = utc_now_text(now)
    arrays: dict[str, Any] = {
        "format": np.array(TIP_FORMAT), "version": np.array(TIP_VERSION),
        "k_per_m": t.k_per_m, "ttf_n_per_a": calibration.ttf_n_per_a, "ttf_unc_n_per_a": calibration.ttf_unc_n_per_a,
        "ttf_raw_n_per_a": t.ttf_n_per_a, "ttf_raw_std_n_per_a": t.ttf_std_n_per_a, "snr": t.snr,
        "in_band": t.in_band, "bias_rel": calibration.bias_rel, "band_k_per_m": np.array(t.band_k_per_m),
        "band_nm": np.array(summary["band_nm"]), "ring_correlation": np.array(calibration.ring_correlation),
        "pixel_nm": np.array(pixel_m) * 1e9, "measurement_plane_nm": np.array(calibration.plane_m * 1e9),
        "plane_std_nm": np.array(calibration.plane_std_m * 1e9),
        "amplitude_nm": np.array(np.nan if calibration.amplitude_m is None else calibration.amplitude_m * 1e9),
        "ms_ka_per_m": np.array(calibration.ms_a_per_m / 1e3),
        "ms_std_ka_per_m": np.array(calibration.ms_std_a_per_m / 1e3),
        "thickness_nm": np.array(calibration.thickness_m * 1e9),
        "thickness_std_nm": np.array(calibration.thickness_std_m * 1e9), "tip_moment": np.array(calibration.tip_moment),
        "spring_constant_n_per_m": np.array(spring_constant_n_per_m), "quality_factor": np.array(quality_factor),
        "spring_constant_std_n_per_m": np.array(np.nan if spring_constant_std_n_per_m is None
                                                else spring_constant_std_n_per_m),
        "quality_factor_std": np.array(np.nan if quality_factor_std is None else quality_factor_std),
        "probe": np.array(probe or ""), "created_utc": np.array(created), "reference": np.array(reference),
        "regularization": np.array(t.alpha_relative),
        "point_probe_determined": np.array(bool(summary["point_probe_determined"])),
        "point_probe_model": np.array(summary["point_probe_model"] or ""),
        "point_probe_verdict": np.array(summary["point_probe_verdict"] or ""),
        "gradient_n_per_m": np.asarray(gradient_n_per_m, dtype=float), "pattern": t.pattern,
        "initial_pattern": t.initial_pattern, "hz_reference_a_per_m": t.hz_a_per_m,
        "ttf_2d_real_n_per_a": t.ttf_2d_n_per_a.real, "ttf_2d_imag_n_per_a": t.ttf_2d_n_per_a.imag,
    }
    for key in ("dipole_a_m2", "dipole_std_a_m2", "monopole_a_m", "monopole_std_a_m", "offset_nm", "offset_std_nm"):
        arrays[key] = np.array(np.nan if summary[key] is None else summary[key])
    _write_npz(path, arrays, "tip")
    summary.update(created_utc=created, probe=probe, reference=reference, pixel_nm=[p * 1e9 for p in pixel_m])
    return summary


def read_tip_file(path: str | os.PathLike[str]) -> TipFile:
    """Read a tip file; :class:`QuantitativeFileError` names what is wrong (not a file, not a tip file, missing
    keys)."""
    p = Path(path)
    if not p.is_file():
        raise QuantitativeFileError(f"tip file not found: {p}")
    try:
        with np.load(p, allow_pickle=False) as z:
            raw = {k: z[k] for k in z.files}
    except (OSError, ValueError) as exc:
        raise QuantitativeFileError(f"{p}: not a readable .npz tip file ({exc})") from None
    if str(raw.get("format", "")) != TIP_FORMAT:
        raise QuantitativeFileError(f"{p}: not a tip file (written by mfma analyze tip; format {TIP_FORMAT!r})")
    missing = [k for k in _TIP_REQUIRED if k not in raw]
    if missing:
        raise QuantitativeFileError(f"{p}: tip file lacks {', '.join(missing)}")
    if int(raw["version"]) != TIP_VERSION:
        raise QuantitativeFileError(f"{p}: tip file version {int(raw['version'])}; this software reads version "
                                    f"{TIP_VERSION}")
    values: dict[str, Any] = {}
    for key, a in raw.items():
        if a.ndim == 0:
            values[key] = str(a) if a.dtype.kind == "U" else a.item()
        else:
            values[key] = a
    return TipFile(p, values)


def write_field_file(path: str | os.PathLike[str], field_map, *, extra: dict[str, Any]) -> None:
    """FIELD.npz: ``hz_a_per_m``, ``hz_std_a_per_m`` (rows, cols), ``height_nm``, ``pixel_nm`` [row, column], plus
    ``mu0_hz_mt``, ``measurement_plane_nm``, ``band_nm``, ``margin_px``, ``warnings`` and the scalars in ``extra``."""
    from assistant.analysis.constants import MU_0_N_PER_A2 as mu0

    arrays: dict[str, Any] = {
        "hz_a_per_m": field_map.hz_a_per_m, "hz_std_a_per_m": field_map.hz_std_a_per_m,
        "height_nm": np.array(field_map.height_m * 1e9), "pixel_nm": np.array(field_map.pixel_m) * 1e9,
        "mu0_hz_mt": field_map.hz_a_per_m * mu0 * 1e3,
        "measurement_plane_nm": np.array(field_map.plane_m * 1e9),
        "band_nm": np.array(field_map.band_periods_m) * 1e9, "margin_px": np.array(field_map.margin_px),
        "warnings": np.array(list(field_map.warnings) or [""]),
    }
    for key, value in extra.items():
        arrays[key] = np.array("" if value is None else value)
    _write_npz(path, arrays, "field")


def _write_npz(path: str | os.PathLike[str], arrays: dict, what: str) -> None:
    """Write ``arrays`` to ``path`` (which must end in .npz) as the ``what`` file, with one-line errors."""
    target = Path(path)
    if target.suffix.lower() != ".npz":
        raise QuantitativeFileError(f"{target}: the {what} file must end in .npz")
    try:
        with open(target, "wb") as handle:
            np.savez(handle, **arrays)
    except OSError as exc:
        raise QuantitativeFileError(f"{target}: cannot write the {what} file ({exc.strerror or exc})") from None
