"""Recorded tracks in an MFM image: tracks, transitions, bit-cell grid, jitter, transition width, erase bands.

One entry point, :func:`analyse_tracks` (pure: an image in, a frozen :class:`TrackAnalysis` out). Steps:

1. orientation of the magnetisation (:mod:`.orientation`) and the track direction: the image axis along which
   bands of activity (rows with transitions) stand out from the rest (:mod:`.track_layout`);
2. a small skew of the tracks against the scan lines, from the shift between the upper and lower halves of each
   track, taken out before rows are averaged;
3. per track the mean of its core rows (the middle 60 % of its width) as a down-track profile, and every
   transition in it by one joint fit (:mod:`.transitions`), which removes the pull of neighbouring transitions;
4. per track the bit-cell grid (:mod:`.bit_grid`); bit length over all tracks weighted by their standard
   errors; jitter pooled over the tracks, with the fit's own position noise taken out in quadrature;
5. transition width: the fit gives w = z + a (+ the tip's offset) for the arctan parameter a of the
   Williams-Comstock transition (Williams & Comstock 1971, AIP Conf. Proc. 5, 738; from memory). The lift height
   takes z off (the continuation exp(-k z) of the charge formulation); the tip's offset and shape come off
   only with its transfer function (``tip_transfer``, e.g. from a quantitative-MFM calibration, or
   :func:`.transfer.point_probe_transfer`); without one the reported width is a + offset, an upper bound.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..lift_series import white_noise_std
from .errors import MediaInputError, TooFewPixelsPerBitError
from .orientation import Orientation, magnetisation_orientation
from .track_layout import find_tracks

__all__ = ["TrackResult", "TrackAnalysis", "analyse_tracks"]

TYPICAL_TIP_OFFSET_M = 30e-9  # starting values only: a point probe's effective offset and a transition's arctan
TYPICAL_TRANSITION_M = 10e-9  # parameter (rules of thumb, no source); three starting widths are tried anyway
MAX_RELATIVE_RESIDUAL = 0.2  # a track model leaving more of the profile unexplained has missed transitions
GOOD_RELATIVE_RESIDUAL = 0.08  # ... and one leaving less needs no other starting width (rules of thumb)
CORE_FRACTION = 0.2  # half-width of the rows averaged per track, as a fraction of its width (rule of thumb)


@dataclass(frozen=True)
class TrackResult:
    """One track (metres; along-track positions from the image's first column edge, across from its first row
    edge, in the image's own orientation)."""

    index: int
    centre_m: float | None
    width_m: float | None
    edges_m: tuple[float | None, float | None]
    bit_length_m: float | None
    bit_length_std_m: float | None
    phase_m: float | None
    jitter_m: float | None
    positions_m: np.ndarray
    positions_std_m: np.ndarray
    deviations_m: np.ndarray
    signs: np.ndarray
    fitted_width_m: float | None
    off_grid: np.ndarray | None = None   # more than 30 % of a cell from the grid: not jitter, left out of it
    core_m: tuple[float, float] | None = None  # centre and half-width of the rows averaged for the profile
    in_jitter: np.ndarray | None = None  # the transitions the reported jitter was computed from

    def to_dict(self) -> dict:
        def nm(v):
            return None if v is None or not np.isfinite(v) else round(float(v) * 1e9, 4)
        return {"index": self.index, "centre_nm": nm(self.centre_m), "width_nm": nm(self.width_m),
                "edges_nm": [nm(e) for e in self.edges_m], "bit_length_nm": nm(self.bit_length_m),
                "bit_length_std_nm": nm(self.bit_length_std_m), "phase_nm": nm(self.phase_m),
                "jitter_nm": nm(self.jitter_m), "transitions": int(self.positions_m.size),
                "off_grid": 0 if self.off_grid is None else int(np.sum(self.off_grid))}


@dataclass(frozen=True)
class TrackAnalysis:
    """Result of :func:`analyse_tracks`. Lengths in metres; None where not measurable (see ``sentences``)."""

    orientation: Orientation
    has_tracks: bool
    sentences: tuple[str, ...]
    tracks_along_rows: bool
    pixel_m: tuple[float, float]
    shape: tuple[int, int]
    skew_px_per_row: float
    tracks: tuple[TrackResult, ...]
    bit_length_m: float | None
    bit_length_std_m: float | None
    track_pitch_m: float | None
    track_pitch_std_m: float | None
    track_width_m: float | None
    track_width_std_m: float | None
    transition_jitter_m: float | None
    jitter_raw_m: float | None
    position_noise_m: float | None
    interaction_shift_m: float | None
    transition_width_m: float | None
    transition_width_std_m: float | None
    transition_width_includes_tip: bool
    erase_band_m: float | None
    activity: np.ndarray | None
    transition_width_includes_oscillation: bool = False  # no amplitude given: its averaging is in the width

    def to_dict(self) -> dict:
        """The JSON of ``mfma analyze image`` (the media keys are null when the image has no tracks)."""
        def nm(v):
            return None if v is None or not np.isfinite(v) else float(v) * 1e9
        out = {"orientation": self.orientation.orientation,
               "orientation_confidence": round(float(self.orientation.confidence), 3),
               "orientation_evidence": list(self.orientation.evidence),
               "bit_length_nm": nm(self.bit_length_m), "bit_length_std_nm": nm(self.bit_length_std_m),
               "track_pitch_nm": nm(self.track_pitch_m), "track_pitch_std_nm": nm(self.track_pitch_std_m),
               "track_width_nm": nm(self.track_width_m), "track_width_std_nm": nm(self.track_width_std_m),
               "transition_jitter_nm": nm(self.transition_jitter_m), "jitter_raw_nm": nm(self.jitter_raw_m),
               "position_noise_nm": nm(self.position_noise_m),
               "interaction_shift_nm": nm(self.interaction_shift_m),
               "transition_width_nm": nm(self.transition_width_m),
               "transition_width_std_nm": nm(self.transition_width_std_m),
               "transition_width_includes_tip": self.transition_width_includes_tip if self.has_tracks else None,
               "transition_width_includes_oscillation": (self.transition_width_includes_oscillation
                                                         if self.has_tracks else None),
               "erase_band_nm": nm(self.erase_band_m),
               "track_direction": None if not self.has_tracks else ("rows" if self.tracks_along_rows else "columns"),
               "skew_deg": None if not self.has_tracks else float(np.degrees(np.arctan(self.skew_px_per_row * (
                   self.pixel_m[1] if self.tracks_along_rows else self.pixel_m[0]) / (
                   self.pixel_m[0] if self.tracks_along_rows else self.pixel_m[1])))),
               "tracks": None, "transitions": None, "summary": " ".join(self.sentences)}
        if self.has_tracks:
            out["tracks"] = [t.to_dict() for t in self.tracks]
            out["transitions"] = [{"track": t.index, "position_nm": round(float(x) * 1e9, 4),
                                   "position_std_nm": round(float(s) * 1e9, 4),
                                   "deviation_nm": (None if d is None or not np.isfinite(d)
                                                    else round(float(d) * 1e9, 4)),
                                   "sign": int(g), "off_grid": bool(o), "in_jitter": bool(j)}
                                  for t in self.tracks
                                  for x, s, d, g, o, j in zip(t.positions_m, t.positions_std_m, t.deviations_m,
                                                              t.signs, _flags(t.off_grid, t.positions_m.size),
                                                              _flags(t.in_jitter, t.positions_m.size))]
        return out


def _flags(mask: np.ndarray | None, n: int) -> np.ndarray:
    return np.zeros(n, bool) if mask is None else mask


def no_tracks(orientation, pixel, shape, reason) -> TrackAnalysis:
    return TrackAnalysis(orientation, False, (reason,), True, pixel, shape, 0.0, (), None, None, None, None, None,
                         None, None, None, None, None, None, None, False, None, None)


def analyse_tracks(phase_deg, *, pixel_m, lift_m: float | None = None, thickness_m: float | None = None,
                   tip_transfer: Callable[[np.ndarray], np.ndarray] | None = None, noise_deg: float | None = None,
                   min_pixels_per_bit: float = 4.0, amplitude_m: float | None = None) -> TrackAnalysis:
    """Media metrics of an MFM image of recorded tracks.

    Parameters
    ----------
    phase_deg : array_like (rows, cols)
        Second-pass phase [deg]; NaN pixels are filled with the median.
    pixel_m : float or (float, float)
        Pixel spacing [m]: one value, or (between rows, along a row).
    lift_m : float, optional
        Lift height of the image [m] (the measurement plane: the oscillating tip's closest approach): taken off
        the transition width.
    thickness_m : float, optional
        Film thickness [m] (the thickness factor 1 - exp(-k t)); fitted when not given.
    tip_transfer : callable, optional
        The tip transfer function TTF(k), k in rad/m (real, even; a scale factor does not matter), for example
        from a quantitative-MFM calibration or :func:`.transfer.point_probe_transfer`. Without it the tip is a
        point dipole at an unknown offset, which stays in the transition width.
    noise_deg : float, optional
        Per-pixel noise [deg]; from the image's highest spatial frequencies otherwise.
    amplitude_m : float, optional
        Peak amplitude of the cantilever's oscillation in the image [m]: its averaging
        (``quantitative.conversion.amplitude_weight``, which loads scipy.special) enters the response model;
        without it the transition width includes it (it widens the response).
    min_pixels_per_bit : float
        Fewer pixels per bit cell than this along the track raise :class:`TooFewPixelsPerBitError` (rule of
        thumb, no source: a transition needs a few samples on either side to be placed).
    """
    u = np.asarray(phase_deg, float)
    if u.ndim != 2 or min(u.shape) < 16:
        raise MediaInputError(f"phase_deg must be one image of at least 16 × 16 pixels, got shape {u.shape}")
    pix = (float(pixel_m), float(pixel_m)) if np.ndim(pixel_m) == 0 else (float(pixel_m[0]), float(pixel_m[1]))
    if not all(np.isfinite(p) and p > 0 for p in pix):
        raise MediaInputError(f"pixel_m must be positive, got {pixel_m!r}")
    if amplitude_m is not None and not (np.isfinite(amplitude_m) and amplitude_m >= 0):
        raise MediaInputError(f"amplitude_m must be >= 0, got {amplitude_m!r}")
    if thickness_m is not None and not (np.isfinite(thickness_m) and thickness_m > 0):
        raise MediaInputError(f"thickness_m must be > 0 (a film of no thickness has no field), got {thickness_m!r}")
    ok = np.isfinite(u)
    if ok.mean() < 0.5:
        what = "infinite" if not np.isnan(u).any() else ("NaN" if not np.isinf(u).any() else "NaN or infinite")
        raise MediaInputError(f"more than half of the image is not finite ({1 - ok.mean():.0%} {what})")
    u = np.where(ok, u, np.median(u[ok]))
    noise = float(noise_deg) if noise_deg is not None else white_noise_std(u)
    noise = max(noise, 1e-9 * float(np.std(u)) + 1e-300)
    # the track direction: the axis along which the bands of activity are the more regular (tracks read along
    # them cover most rows with bands of one width; read across them, the bands are short and irregular); when
    # no transition can be placed along it, the other axis is tried before giving up
    from .track_fit import analyse_along

    orient_probe = magnetisation_orientation(u, pixel_m=pix, noise_deg=noise)
    layouts = []
    for ax in (1, 0):
        candidate = find_tracks(u if ax == 1 else u.T, noise=noise)
        if candidate is not None and candidate.regularity > 0:
            layouts.append((candidate.regularity, ax, candidate))
    failure: Exception | None = None
    for _, axis, layout in sorted(layouts, key=lambda t: t[0], reverse=True):
        try:
            result = analyse_along(u, layout, axis, pix=pix, noise=noise, lift_m=lift_m, thickness_m=thickness_m,
                                   tip_transfer=tip_transfer, min_pixels_per_bit=min_pixels_per_bit,
                                   amplitude_m=amplitude_m)
        except TooFewPixelsPerBitError as exc:
            failure = failure or exc
            continue
        if result.has_tracks:
            return result
        failure = failure or result
    if isinstance(failure, TooFewPixelsPerBitError):
        raise failure
    if isinstance(failure, TrackAnalysis):
        return failure
    return no_tracks(orient_probe, pix, u.shape, "No recorded tracks: no band of transitions stands out from the "
                     "rest of the image, so the media metrics are null.")


def raise_too_few(bit_m: float, px_down: float, min_pixels_per_bit: float):
    need = bit_m / min_pixels_per_bit
    raise TooFewPixelsPerBitError(
        f"bits of about {bit_m * 1e9:.3g} nm are only {bit_m / px_down:.2g} pixels long; at least "
        f"{min_pixels_per_bit:g} pixels per bit are needed: scan with pixels of at most {need * 1e9:.3g} nm along "
        "the track", needed_pixel_m=need, bit_length_m=bit_m)


