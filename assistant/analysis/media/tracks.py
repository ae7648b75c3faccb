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

from ..noise_floor import white_noise_std
from .orientation import Orientation, magnetisation_orientation
from .track_layout import TrackLayout, find_tracks
from .transitions import TrackTransitions, fit_track_transitions

__all__ = ["MediaInputError", "TooFewPixelsPerBitError", "TrackResult", "TrackAnalysis", "analyse_tracks"]

TYPICAL_TIP_OFFSET_M = 20e-9  # starting values only: a point probe's effective offset and a transition's arctan
TYPICAL_TRANSITION_M = 10e-9  # parameter (rules of thumb, no source); three starting widths are tried anyway
MAX_RELATIVE_RESIDUAL = 0.2  # a track model leaving more of the profile unexplained has missed transitions
GOOD_RELATIVE_RESIDUAL = 0.05  # ... and one leaving less needs no other starting width (rules of thumb)
CORE_FRACTION = 0.2  # half-width of the rows averaged per track, as a fraction of its width (rule of thumb)


class MediaInputError(ValueError):
    """The image cannot be analysed (shape, pixel size)."""


class TooFewPixelsPerBitError(MediaInputError):
    """Bits shorter than the resolvable minimum of pixels; ``needed_pixel_m`` is the largest pixel that works."""

    def __init__(self, message: str, *, needed_pixel_m: float, bit_length_m: float):
        super().__init__(message)
        self.needed_pixel_m = needed_pixel_m
        self.bit_length_m = bit_length_m


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
                                   "deviation_nm": None if d is None or not np.isfinite(d) else round(float(d) * 1e9, 4),
                                   "sign": int(g), "off_grid": bool(o)}
                                  for t in self.tracks
                                  for x, s, d, g, o in zip(t.positions_m, t.positions_std_m, t.deviations_m, t.signs,
                                                           t.off_grid if t.off_grid is not None
                                                           else np.zeros(t.positions_m.size, bool))]
        return out


def _fourier_shift_rows(rows: np.ndarray, shifts_px: np.ndarray) -> np.ndarray:
    """Move each row's content by ``shifts_px`` along the row (mirror-extended, band-limited)."""
    n = rows.shape[-1]
    ext = np.concatenate([rows, rows[:, ::-1]], axis=1)
    f = np.fft.rfftfreq(2 * n)
    spec = np.fft.rfft(ext, axis=1) * np.exp(-2j * np.pi * np.outer(shifts_px, f))
    return np.fft.irfft(spec, n=2 * n, axis=1)[:, :n]


def _skew(image: np.ndarray, layout: TrackLayout) -> float:
    """Down-track shift per row of the tracks' content (median over tracks of the shift between the upper and
    lower halves of each track, from the peak of their cross-correlation, parabola-refined)."""
    out = []
    for b in layout.tracks:
        lo, hi = b.first_row, b.last_row
        if hi - lo < 5:
            continue
        mid = (lo + hi) // 2
        a = image[lo:mid].mean(axis=0)
        c = image[mid + 1:hi + 1].mean(axis=0)
        a, c = a - a.mean(), c - c.mean()
        n = a.size
        xc = np.fft.irfft(np.fft.rfft(c, 2 * n) * np.conj(np.fft.rfft(a, 2 * n)), 2 * n)
        xc = np.concatenate([xc[-n // 4:], xc[:n // 4 + 1]])
        i = int(np.argmax(xc))
        if 0 < i < xc.size - 1:
            y0, y1, y2 = xc[i - 1], xc[i], xc[i + 1]
            den = y0 - 2 * y1 + y2
            frac = 0.5 * (y0 - y2) / den if den != 0 else 0.0
        else:
            frac = 0.0
        shift = i - n // 4 + frac
        dist = 0.5 * ((mid + 1 + hi) - (lo + mid - 1))
        out.append(shift / max(dist, 1.0))
    return float(np.median(out)) if out else 0.0


def _core_rows(band, rows: int) -> np.ndarray:
    if band.complete:
        c, half = band.centre, CORE_FRACTION * band.width
        idx = np.arange(int(np.ceil(c - half)), int(np.floor(c + half)) + 1)
    else:
        first, last = band.first_row, band.last_row
        cut = int(round(0.2 * (last - first + 1)))
        idx = np.arange(first + (cut if band.lower is not None or first > 0 else 0),
                        last - (cut if band.upper is not None or last < rows - 1 else 0) + 1)
        if band.lower is None and first == 0:
            idx = np.arange(first, last - cut + 1)
        elif band.upper is None and last == rows - 1:
            idx = np.arange(first + cut, last + 1)
    idx = idx[(idx >= 0) & (idx < rows)]
    if idx.size == 0:
        idx = np.array([int(round(0.5 * (band.first_row + band.last_row)))])
    return idx


def no_tracks(orientation, pixel, shape, reason) -> TrackAnalysis:
    return TrackAnalysis(orientation, False, (reason,), True, pixel, shape, 0.0, (), None, None, None, None, None,
                         None, None, None, None, None, None, None, False, None, None)


def analyse_tracks(phase_deg, *, pixel_m, lift_m: float | None = None, thickness_m: float | None = None,
                   tip_transfer: Callable[[np.ndarray], np.ndarray] | None = None, noise_deg: float | None = None,
                   min_pixels_per_bit: float = 4.0) -> TrackAnalysis:
    """Media metrics of an MFM image of recorded tracks.

    Parameters
    ----------
    phase_deg : array_like (rows, cols)
        Second-pass phase [deg]; NaN pixels are filled with the median.
    pixel_m : float or (float, float)
        Pixel spacing [m]: one value, or (between rows, along a row).
    lift_m : float, optional
        Lift height of the image [m] (the measurement plane): taken off the transition width.
    thickness_m : float, optional
        Film thickness [m] (the thickness factor 1 - exp(-k t)); fitted when not given.
    tip_transfer : callable, optional
        The tip transfer function TTF(k), k in rad/m (real, even; a scale factor does not matter), for example
        from a quantitative-MFM calibration or :func:`.transfer.point_probe_transfer`. Without it the tip is a
        point dipole at an unknown offset, which stays in the transition width.
    noise_deg : float, optional
        Per-pixel noise [deg]; from the image's highest spatial frequencies otherwise.
    min_pixels_per_bit : float
        Fewer pixels per bit cell than this along the track raise :class:`TooFewPixelsPerBitError` (rule of
        thumb, no source: a transition needs a few samples on either side to be placed).
    """
    u = np.asarray(phase_deg, float)
    if u.ndim != 2 or min(u.shape) < 16:
        raise MediaInputError(f"phase_deg must be one image of at least 16 x 16 pixels, got shape {u.shape}")
    pix = (float(pixel_m), float(pixel_m)) if np.ndim(pixel_m) == 0 else (float(pixel_m[0]), float(pixel_m[1]))
    if not all(np.isfinite(p) and p > 0 for p in pix):
        raise MediaInputError(f"pixel_m must be positive, got {pixel_m!r}")
    ok = np.isfinite(u)
    if ok.mean() < 0.5:
        raise MediaInputError(f"more than half of the image is NaN ({1 - ok.mean():.0%})")
    u = np.where(ok, u, np.median(u[ok]))
    noise = float(noise_deg) if noise_deg is not None else white_noise_std(u)
    noise = max(noise, 1e-9 * float(np.std(u)) + 1e-300)
    # the track direction: the axis along which the bands of activity are the more regular (tracks read along
    # them cover most rows with bands of one width; read across them, the bands are short and irregular)
    orient_probe = magnetisation_orientation(u, pixel_m=pix, noise_deg=noise)
    layout, axis = None, 1
    for ax in (1, 0):
        candidate = find_tracks(u if ax == 1 else u.T, noise=noise)
        if candidate is not None and candidate.regularity > 0 and (
                layout is None or candidate.regularity > layout.regularity):
            layout, axis = candidate, ax
    if layout is None:
        return no_tracks(orient_probe, pix, u.shape, "No recorded tracks: no band of transitions stands out from the "
                         "rest of the image, so the media metrics are null.")
    orient = magnetisation_orientation(u, pixel_m=pix, noise_deg=noise, axis=axis)
    img = u if axis == 1 else u.T
    px_down, px_across = (pix[1], pix[0]) if axis == 1 else (pix[0], pix[1])
    skew = _skew(img, layout)
    if abs(skew) * img.shape[0] > 0.2:
        rows_idx = np.arange(img.shape[0]) - 0.5 * (img.shape[0] - 1)
        img = _fourier_shift_rows(img, -skew * rows_idx)
    tip = None if tip_transfer is None else (lambda k, f=tip_transfer, p=px_down: f(np.asarray(k) / p))
    # starting w: lift + the arctan parameter (+ the tip's offset, unless its transfer function carries it)
    w0 = ((lift_m or 20e-9) + TYPICAL_TRANSITION_M + (0.0 if tip_transfer is not None else TYPICAL_TIP_OFFSET_M)) / px_down
    t_px = None if thickness_m is None else float(thickness_m) / px_down
    tracks_bands = [b for b in layout.tracks]
    profiles = []
    for b in tracks_bands:
        core = _core_rows(b, img.shape[0])
        # the track's width and the core's half-width, in down-track pixels, for the finite-track response
        geom = None if b.width is None else (b.width * px_across / px_down, 0.5 * core.size * px_across / px_down)
        profiles.append((b, img[core].mean(axis=0), noise / np.sqrt(core.size), geom))
    # orientation of the transition model: the image's verdict, else the better fit on the first track
    candidates = ([orient.orientation] if orient.orientation != "undetermined" else ["out-of-plane", "in-plane"])
    # the shape is fitted on the strongest complete track that yields a good fit (then held for the others);
    # the starting width is only a guess (the tip's offset is unknown), so a few are tried
    best, first = None, None
    for cand in sorted(profiles, key=lambda p: (p[3] is not None, p[1].std()), reverse=True)[:3]:
        scale = float(np.std(cand[1]))
        for start in (w0, 1.5 * w0, 0.7 * w0):
            for name in candidates:
                fit = _fit_with_width(cand[1], name, cand[2], start, t_px, tip, cand[3])
                if fit is not None and (best is None or fit[1].residual_rms < best[1].residual_rms):
                    best, first = (name, fit[1], fit[0]), cand
            if best is not None and best[1].residual_rms < GOOD_RELATIVE_RESIDUAL * scale:
                break
        if best is not None and best[1].residual_rms <= MAX_RELATIVE_RESIDUAL * float(np.std(first[1])):
            break
    if best is not None and best[1].residual_rms > MAX_RELATIVE_RESIDUAL * float(np.std(first[1])):
        best = None  # transitions missed wholesale: most often bits the pixels do not resolve
    if best is None:
        period = _dominant_period_px(max(profiles, key=lambda p: p[1].std())[1])
        if period is not None and period < min_pixels_per_bit:
            raise_too_few(period * px_down, px_down, min_pixels_per_bit)
        return no_tracks(orient, pix, u.shape, "Bands of activity were found, but no track holds three transitions "
                         "that can be placed (bits shorter than the pixels resolve, at least "
                         f"{min_pixels_per_bit:g} per bit, or a lift too high for them): the media metrics are null.")
    model_orientation, shaped, _ = best
    # the shape (w, thickness) is the image's, fitted on the strongest track; the others hold it
    fits: list[tuple[object, TrackTransitions]] = []
    for b, prof, nz, geom in profiles:
        if prof is first[1]:
            f = shaped
        else:
            f = fit_track_transitions(prof, orientation=model_orientation, noise=nz, width_px=shaped.width_px,
                                      thickness_px=shaped.thickness_px, fit_shape=False, tip_transfer=tip,
                                      **_geometry(geom))
            scale = float(np.std(prof))
            if f is None or f.residual_rms > GOOD_RELATIVE_RESIDUAL * scale:
                # a poor fit has missed transitions (or taken a lobe for one): seed again from other widths and
                # let the shape move; the best fit stays
                for start in (1.5 * shaped.width_px, 0.7 * shaped.width_px, shaped.width_px):
                    g = fit_track_transitions(prof, orientation=model_orientation, noise=nz, width_px=start,
                                              thickness_px=shaped.thickness_px, fit_thickness=t_px is None,
                                              tip_transfer=tip, **_geometry(geom))
                    if g is not None and (f is None or g.residual_rms < f.residual_rms):
                        f = g
        if f is not None:
            fits.append((b, f))
    from .track_metrics import summarise

    return summarise(orient, model_orientation, orient.orientation == "undetermined", layout, fits, pix, u.shape,
                     axis == 1, skew, px_down, px_across, lift_m, tip_transfer is not None, min_pixels_per_bit)


def _geometry(geom) -> dict:
    return {} if geom is None else {"track_width_px": geom[0], "core_half_px": geom[1]}


def _fit_with_width(profile, orientation, noise, w0, t_px, tip, geom):
    """Fit with a starting width; when the fitted width differs by more than 30 %, detect again with it."""
    f = fit_track_transitions(profile, orientation=orientation, noise=noise, width_px=w0, thickness_px=t_px,
                              fit_thickness=t_px is None, tip_transfer=tip, **_geometry(geom))
    if f is not None and abs(f.width_px / w0 - 1.0) > 0.3:
        g = fit_track_transitions(profile, orientation=orientation, noise=noise, width_px=f.width_px,
                                  thickness_px=t_px, fit_thickness=t_px is None, tip_transfer=tip,
                                  **_geometry(geom))
        if g is not None and g.residual_rms <= f.residual_rms:
            return f.width_px, g
    return (w0, f) if f is not None else None


def _dominant_period_px(profile: np.ndarray) -> float | None:
    """A rough bit length when no transition could be placed: the median spacing of the profile's extrema
    (about one per transition), in pixels."""
    d = np.diff(profile)
    ext = np.flatnonzero(np.sign(d[1:]) != np.sign(d[:-1])) + 1
    return float(np.median(np.diff(ext))) if ext.size >= 3 else None


def raise_too_few(bit_m: float, px_down: float, min_pixels_per_bit: float):
    need = bit_m / min_pixels_per_bit
    raise TooFewPixelsPerBitError(
        f"bits of about {bit_m * 1e9:.3g} nm are only {bit_m / px_down:.2g} pixels long; at least "
        f"{min_pixels_per_bit:g} pixels per bit are needed: scan with pixels of at most {need * 1e9:.3g} nm along "
        "the track", needed_pixel_m=need, bit_length_m=bit_m)


