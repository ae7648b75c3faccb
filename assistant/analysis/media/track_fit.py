"""Recorded tracks along one image axis: profiles of the tracks' cores, the joint fits, the summary.

Called by :func:`.tracks.analyse_tracks` for the axis it takes as the track direction (see there for the steps).
"""

from __future__ import annotations

import numpy as np

from .orientation import magnetisation_orientation
from .track_layout import TrackLayout
from .tracks import (CORE_FRACTION, GOOD_RELATIVE_RESIDUAL, MAX_RELATIVE_RESIDUAL, TYPICAL_TIP_OFFSET_M,
                     TYPICAL_TRANSITION_M, TrackAnalysis, no_tracks, raise_too_few)
from .transitions import TrackTransitions, fit_track_transitions

__all__ = ["analyse_along"]


def analyse_along(u: np.ndarray, layout: TrackLayout, axis: int, *, pix, noise, lift_m, thickness_m, tip_transfer,
                  min_pixels_per_bit, amplitude_m=None) -> TrackAnalysis:
    """Tracks of ``layout`` with the image read along ``axis`` (1: rows run along the tracks, 0: columns)."""
    orient = magnetisation_orientation(u, pixel_m=pix, noise_deg=noise, axis=axis)
    img = u if axis == 1 else u.T
    px_down, px_across = (pix[1], pix[0]) if axis == 1 else (pix[0], pix[1])
    skew = _skew(img, layout)
    # each core row's content is moved by -skew (row - the core's centre row): the track straight where its core
    # lies, so the positions need no moving back. The image used to be straightened about its middle row, which
    # moved the rows of a track far from it by up to half the skew across the image (4 px for 8 px) and brought
    # the shift's mirror image in at each end of a row, fitted as data; about the core's centre the shifts are a
    # fraction of a pixel (on 40 skewed synthetic scans, 3 and 8 px: transitions more than 5 nm off 19 -> 4)
    deskew = skew if abs(skew) * img.shape[0] > 0.2 else 0.0
    tip = None if tip_transfer is None else (lambda k, f=tip_transfer, p=px_down: f(np.asarray(k) / p))
    if amplitude_m:  # the image averages the field over the oscillation: the tip's weight times its own
        # (Giessibl's weight; it loads scipy.special, only when an amplitude is given)
        from ..quantitative import amplitude_weight

        tip = (lambda k, f=tip, a=amplitude_m / px_down: (np.asarray(k) ** 2 if f is None else f(k))
               * amplitude_weight(k, a))
    # starting w: lift + the arctan parameter (+ the tip's offset, unless its transfer function carries it)
    w0 = ((lift_m or 20e-9) + TYPICAL_TRANSITION_M
          + (0.0 if tip_transfer is not None else TYPICAL_TIP_OFFSET_M)) / px_down
    t_px = None if thickness_m is None else float(thickness_m) / px_down
    tracks_bands = [b for b in layout.tracks]
    profiles = []
    cores: dict[int, tuple[float, float]] = {}  # per band: centre and half-width of the averaged rows [rows]
    for b in tracks_bands:
        core = _core_rows(b, img.shape[0])
        # the track's width and the core's half-width, in down-track pixels, for the finite-track response
        geom = None if b.width is None else (b.width * px_across / px_down, 0.5 * core.size * px_across / px_down)
        centre = 0.5 * (core[0] + core[-1])
        rows = img[core] if not deskew else _fourier_shift_rows(img[core], -deskew * (core - centre))
        profiles.append((b, rows.mean(axis=0), noise / np.sqrt(core.size), geom))
        cores[id(b)] = (centre, 0.5 * (core[-1] - core[0] + 1))
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
                if fit is not None and (best is None or _better(fit[1], best[1], cand is first)):
                    best, first = (name, fit[1], fit[0]), cand
            if best is not None and best[1].residual_rms < GOOD_RELATIVE_RESIDUAL * scale:
                break
        if best is not None and best[1].residual_rms < GOOD_RELATIVE_RESIDUAL * float(np.std(first[1])):
            break  # a fit this good needs no other track (a merely acceptable one does: it may be a wrong shape)
    if best is not None and best[1].residual_rms > MAX_RELATIVE_RESIDUAL * float(np.std(first[1])):
        best = None  # transitions missed wholesale: most often bits the pixels do not resolve
    if best is None:
        period = _dominant_period_px(max(profiles, key=lambda p: p[1].std())[1])
        # only bands that look like written tracks (regular, covering most rows) say the bits are too short
        if period is not None and period < min_pixels_per_bit and layout.regularity >= 0.5:
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
                    if g is not None and (f is None or g.information < f.information):
                        f = g
        if f is not None:
            fits.append((b, f))
    from .track_metrics import summarise

    return summarise(orient, model_orientation, orient.orientation == "undetermined", layout, fits, pix, u.shape,
                     axis == 1, skew, px_down, px_across, lift_m, tip_transfer is not None, min_pixels_per_bit,
                     cores, amplitude_m=amplitude_m)




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


def _better(new: TrackTransitions, old: TrackTransitions, same_profile: bool) -> bool:
    """Whether ``new`` fits better than ``old``: of one profile, by the information criterion (a fit with more
    transitions must lower the residual by more than they cost); of two tracks' profiles, by the residual."""
    return new.information < old.information if same_profile else new.residual_rms < old.residual_rms


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
        if g is not None and g.information <= f.information:
            return f.width_px, g
    return (w0, f) if f is not None else None


def _dominant_period_px(profile: np.ndarray) -> float | None:
    """A rough bit length when no transition could be placed: the median spacing of the profile's extrema
    (about one per transition), in pixels."""
    d = np.diff(profile)
    ext = np.flatnonzero(np.sign(d[1:]) != np.sign(d[:-1])) + 1
    return float(np.median(np.diff(ext))) if ext.size >= 3 else None


