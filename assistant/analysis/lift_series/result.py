"""The result of a lift-series decomposition: :class:`SeriesAnalysis`, its JSON summary and its stored form."""

from __future__ import annotations

import dataclasses
import json
import types
import typing
from dataclasses import dataclass

import numpy as np

from .interaction_regime import InteractionRegime
from .noise_floor import NoiseVerdict
from .recommend import Recommendation
from .tip_change import TipChange

__all__ = ["SeriesAnalysis"]


@dataclass(frozen=True)
class SeriesAnalysis:
    """Decomposition of a lift-height series. Arrays for figures; :meth:`to_dict` for JSON.

    Every ``*_deg`` part is the phase that part alone would give (``-arctan(Q F'/k)`` of its gradient when k
    and Q are known; otherwise the small-angle phase itself). ``magnetic_rms_deg`` is the rms over the scan of
    the denoised magnetic image at each height with the fit noise subtracted in quadrature;
    ``magnetic_deg`` are those images (H, rows, cols) in the first height's frame. ``electrostatic_mean_deg``
    is (H,) or, with a bias grid, (H, B); ``short_range_mean_deg`` (H,) is the bias-independent remainder.
    ``*_std_*`` are standard errors: what the noise alone makes the estimate scatter by over repeats with fresh
    noise (first-order propagation, checked by Monte Carlo; see ``error_method``); ``*_model_std_*`` the model
    uncertainty of the image-mean parts (the magnetic window mean, the Birge excess, the spread over tip
    models; :mod:`.mean_parts`), to be combined with the standard error in quadrature.
    ``nonmagnetic_mean_deg`` is the measured image mean, of which the electrostatic and short-range parts
    are the split (heights only: they add up to it; ``mean_model_fit_deg`` is the tip models' own fit).
    ``part_correlation`` is the correlation of the two mean parts at each height. ``noise_deg`` is the
    per-pixel noise of each height's (bias-averaged) image from the fit, ``reference_noise_deg`` an
    independent estimate for one image (repeat pass, else the highest frequencies of the top height).
    ``residual_at_noise`` compares the residual rms away from an edge band of ``edge_band_px`` pixels
    (``residual_rms_interior_deg``) with what that reference noise alone would leave
    (``expected_residual_rms_deg``), within ``residual_tolerance``. With ``edge="reflect"`` the magnetic
    rms is taken over that interior too. ``drift_px`` is (H, 2) or
    (H, B, 2), ``[drow, dcol]`` displacement of the content relative to the first image. ``interaction`` is the
    tip-sample interaction regime (:mod:`.interaction_regime`); its repeat verdict is ``tip_change``.
    """

    heights_m: np.ndarray
    pixel_m: tuple[float, float]        # (row spacing, column spacing)
    bias_v: np.ndarray | None
    magnetic_rms_deg: np.ndarray
    magnetic_rms_std_deg: np.ndarray
    electrostatic_mean_deg: np.ndarray
    electrostatic_mean_std_deg: np.ndarray
    short_range_mean_deg: np.ndarray
    short_range_mean_std_deg: np.ndarray
    part_correlation: np.ndarray
    mean_phase_deg: np.ndarray          # measured image mean (H,) or (H, B)
    mean_phase_std_deg: np.ndarray
    residual_rms_deg: np.ndarray
    expected_residual_rms_deg: np.ndarray   # what pure noise (reference noise) would leave
    residual_rms_interior_deg: np.ndarray   # away from the edge band
    edge_band_px: int
    edge: str                               # estimator: "reflect", "window" or "periodic"
    noise_deg: np.ndarray               # per-height noise of the fitted (bias-averaged) images
    reference_noise_deg: float          # independent noise estimate of one image
    residual_at_noise: np.ndarray
    drift_px: np.ndarray                # (H, 2) or (H, B, 2)
    cpd_v: float | None
    cpd_std_v: float | None
    separable: bool
    separability_sentence: str
    resolution_period_m: np.ndarray
    recommendation: Recommendation
    noise: NoiseVerdict
    tip_change: TipChange | None
    magnetic_deg: np.ndarray            # (H, rows, cols) denoised magnetic image per height
    residual_deg: np.ndarray            # (H, rows, cols)
    nan_pixels: int
    signal_space: str                   # "gradient" (k and Q given) or "phase"
    fitted_parameters: dict
    edge_note: str = ""                 # what the geometry means for the estimator (small scans)
    drift_std_px: np.ndarray | None = None          # standard error of drift_px, same shape
    drift_mean_std_px: np.ndarray | None = None     # (H, 2): of the drift averaged over biases
    nonmagnetic_mean_deg: np.ndarray | None = None  # measured, (H,) or (H, B)
    nonmagnetic_mean_std_deg: np.ndarray | None = None
    nonmagnetic_mean_model_std_deg: np.ndarray | None = None  # the magnetic window mean left in it
    electrostatic_mean_model_std_deg: np.ndarray | None = None
    short_range_mean_model_std_deg: np.ndarray | None = None
    mean_model_fit_deg: np.ndarray | None = None    # (H,) the tip models' averaged fit of the total
    mean_model_reduced_chi2: float | None = None
    mean_model_birge_ratio: float | None = None
    cpd_model_std_v: float | None = None
    tip_models: dict = dataclasses.field(default_factory=dict)  # one array per field over the tip models (cone
    #                                                             NaN = none); empty with a bias grid
    assumed: dict = dataclasses.field(default_factory=dict)     # values not in the data that were assumed
    split_vs_amplitude: dict = dataclasses.field(default_factory=dict)  # the split at the smallest and largest
    #                                                                     amplitude considered, where assumed
    alias_axes: tuple = ()              # axes with alias fields, decided from the pixel spacing and lowest height
    error_method: str = ""              # how the standard errors were obtained and checked
    interaction: InteractionRegime | None = None  # tip-sample interaction regime (set by analyse_series)
    cpd_map_v: np.ndarray | None = None  # (rows, cols) with a bias grid: the contact potential per pixel [V]
    cpd_map_std_v: float | None = None   # its noise per pixel [V]
    drive_phase_offset_deg: float | None = None  # with a bias grid, k and Q: the free lever's phase from quadrature
    drive_phase_offset_std_deg: float | None = None  # at the drive (drive_offset), which the inversion used
    cpd_sentence: str | None = None     # bias grid whose V_cpd is beyond the reach of the biases: why none is given

    @property
    def heights_nm(self) -> np.ndarray:
        return self.heights_m * 1e9

    @property
    def messages(self) -> tuple[str, ...]:
        """Plain-language statements: recommendation, separability, noise, tip change."""
        out = [self.recommendation.sentence, self.separability_sentence, self.noise.sentence]
        if self.tip_change is not None:
            out.append(self.tip_change.sentence)
        if self.edge_note:
            out.append(self.edge_note)
        if self.interaction is not None:
            out.append(self.interaction.evidence)
        return tuple(out)

    def to_dict(self) -> dict:
        """JSON-ready summary (lists and floats; None for missing)."""
        def lst(a):
            return np.asarray(a, float).tolist()

        drift = self.drift_px if self.drift_px.ndim == 2 else self.drift_px.mean(axis=1)
        rec = self.recommendation
        out = {
            "heights_nm": lst(np.round(self.heights_nm, 9)),  # no 30.000000000000004 from the m -> nm round trip
            "magnetic_rms_deg": lst(self.magnetic_rms_deg),
            "magnetic_rms_std_deg": lst(self.magnetic_rms_std_deg),
            "electrostatic_mean_deg": lst(self.electrostatic_mean_deg),
            "electrostatic_mean_std_deg": lst(self.electrostatic_mean_std_deg),
            "short_range_mean_deg": lst(self.short_range_mean_deg),
            "short_range_mean_std_deg": lst(self.short_range_mean_std_deg),
            "residual_rms_deg": lst(self.residual_rms_deg),
            "drift_px": lst(drift),
            "cpd_v": self.cpd_v,
            "cpd_std_v": self.cpd_std_v,
            "cpd_model_std_v": self.cpd_model_std_v,
            "drive_phase_offset_deg": self.drive_phase_offset_deg,
            "drive_phase_offset_std_deg": self.drive_phase_offset_std_deg,
            "drift_std_px": _maybe(self.drift_mean_std_px),
            "nonmagnetic_mean_deg": _maybe(self.nonmagnetic_mean_deg),
            "nonmagnetic_mean_std_deg": _maybe(self.nonmagnetic_mean_std_deg),
            "nonmagnetic_mean_model_std_deg": _maybe(self.nonmagnetic_mean_model_std_deg),
            "electrostatic_mean_model_std_deg": _maybe(self.electrostatic_mean_model_std_deg),
            "short_range_mean_model_std_deg": _maybe(self.short_range_mean_model_std_deg),
            "mean_model_fit_deg": _maybe(self.mean_model_fit_deg),
            "mean_model_reduced_chi2": self.mean_model_reduced_chi2,
            "mean_model_birge_ratio": self.mean_model_birge_ratio,
            "tip_models": _rows(self.tip_models),
            "assumed": dict(self.assumed or {}),
            "split_vs_amplitude": {k: np.asarray(v).tolist() for k, v in self.split_vs_amplitude.items()}
            if self.split_vs_amplitude else None,
            "alias_axes": [int(x) for x in self.alias_axes],
            "error_method": self.error_method,
            "recommended_lift_nm": None if rec.lift_height_m is None else round(rec.lift_height_m * 1e9, 9),
            "recommended_bias_v": rec.bias_v,
            "recommendation": rec.sentence,
            "separable": self.separable,
            "separability": self.separability_sentence,
            "part_correlation": lst(self.part_correlation),
            "expected_residual_rms_deg": lst(self.expected_residual_rms_deg),
            "residual_rms_interior_deg": lst(self.residual_rms_interior_deg),
            "edge_band_px": int(self.edge_band_px),
            "edge": self.edge,
            "edge_note": self.edge_note,
            "residual_at_noise": [bool(x) for x in self.residual_at_noise],
            "noise_deg": lst(self.noise_deg),
            "phase_noise_deg": self.noise.measured_phase_noise_deg,
            "thermal_phase_noise_deg": self.noise.thermal_phase_noise_deg,
            "noise_verdict": self.noise.verdict,
            "noise_sentence": self.noise.sentence,
            "resolution_period_nm": [None if not np.isfinite(x) else x * 1e9 for x in self.resolution_period_m],
            "nan_pixels": int(self.nan_pixels),
            "signal_space": self.signal_space,
            "tip_changed_sample": None if self.tip_change is None else self.tip_change.irreversible,
            "tip_changed_fraction": None if self.tip_change is None else self.tip_change.changed_fraction,
        }
        if self.cpd_sentence is not None:
            out["cpd_sentence"] = self.cpd_sentence
        if self.drift_px.ndim == 3:
            out["drift_px_per_bias"] = lst(self.drift_px)
            if self.drift_std_px is not None:
                out["drift_std_px_per_bias"] = lst(self.drift_std_px)
        if self.interaction is not None:
            out.update(self.interaction.to_dict())
        return out

    def to_record(self) -> tuple[dict, dict]:
        """Every field as plain scalars and arrays, named by its path (``recommendation.sentence``); fields that
        are None are left out. :meth:`from_record` rebuilds an equal result, arrays with their dtype."""
        scalars: dict = {}
        arrays: dict = {}
        _flatten(self, "", scalars, arrays)
        return scalars, arrays

    @classmethod
    def from_record(cls, scalars: dict, arrays: dict) -> "SeriesAnalysis":
        """The result :meth:`to_record` described."""
        return _build(cls, "", scalars, arrays)


def _maybe(a):
    return None if a is None else np.asarray(a, float).tolist()


def _rows(columns: dict | None) -> list[dict]:
    """The tip models as one dict per model, from one array per field (NaN cone angle: no cone)."""
    if not columns:
        return []
    keys = list(columns)
    out = []
    for i in range(len(np.atleast_1d(columns[keys[0]]))):
        row = {k: float(np.atleast_1d(columns[k])[i]) for k in keys}
        if "cone_half_angle_deg" in row and not np.isfinite(row["cone_half_angle_deg"]):
            row["cone_half_angle_deg"] = None
        out.append(row)
    return out


def _flatten(obj, prefix: str, scalars: dict, arrays: dict) -> None:
    for f in dataclasses.fields(obj):
        _put(prefix + f.name, getattr(obj, f.name), scalars, arrays)


def _put(name: str, value, scalars: dict, arrays: dict) -> None:
    if value is None:
        return
    if dataclasses.is_dataclass(value):
        _flatten(value, name + ".", scalars, arrays)
    elif isinstance(value, dict):
        for key, item in value.items():
            _put(f"{name}.{key}", item, scalars, arrays)
    elif isinstance(value, (tuple, list)) and value and all(isinstance(v, str) for v in value):
        scalars[name] = json.dumps(list(value))  # text items (notes): one JSON text, read back as a tuple
    elif isinstance(value, (np.ndarray, tuple, list)):
        arrays[name] = np.asarray(value)
    else:
        scalars[name] = value.item() if isinstance(value, np.generic) else value


def _build(cls, prefix: str, scalars: dict, arrays: dict):
    hints = typing.get_type_hints(cls)
    values = {}
    for f in dataclasses.fields(cls):
        name, hint = prefix + f.name, hints[f.name]
        if typing.get_origin(hint) in (typing.Union, types.UnionType):  # "X | None": the X
            hint = next(k for k in typing.get_args(hint) if k is not type(None))
        kind = typing.get_origin(hint) or hint
        nested = name + "."
        if name in arrays:
            values[f.name] = tuple(arrays[name].tolist()) if kind is tuple else arrays[name]
        elif name in scalars:
            values[f.name] = tuple(json.loads(scalars[name])) if kind is tuple else scalars[name]
        elif dataclasses.is_dataclass(kind) and any(k.startswith(nested) for k in (*scalars, *arrays)):
            values[f.name] = _build(kind, nested, scalars, arrays)
        elif kind is dict:
            values[f.name] = {k[len(nested):]: v for part in (scalars, arrays) for k, v in part.items()
                              if k.startswith(nested)}
        else:
            values[f.name] = None
    return cls(**values)
