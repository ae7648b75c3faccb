"""Where the tracks are: the across-track profile of down-track activity, track edges, pitch, width, erase bands.

Rows of the image run along the tracks (callers transpose first). The activity of a row is the rms of its
down-track differences with the noise's share removed: transitions make it high inside a written track, a
DC-erased band (no transitions) leaves it at noise. The image is linear in the magnetisation, so across a track
edge the amplitude of the transitions' field is the written box blurred by an even kernel (the field's spread
with height): at the edge it is half the plateau, whatever the kernel. Edges are therefore taken where the
activity (noise taken out, so its floor is zero) crosses half the track's plateau, to a fraction of a pixel.

Complete bands of activity narrower than 60 % of the widest complete band are side bands (old data beside a
track); the gap between a track's edge and a side band's edge (half its own plateau) is the erase band. Beside DC-erased guard bands an
erase band cannot be told from the guard band and is not reported. Thresholds: rules of thumb, no source.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

__all__ = ["Band", "TrackLayout", "find_tracks"]


@dataclass(frozen=True)
class Band:
    """One band of activity (rows, fractional)."""

    lower: float | None          # edge position (row) or None where the band runs off the image
    upper: float | None
    first_row: int               # rows above the half level
    last_row: int
    level: float                 # plateau activity
    kind: str                    # "track", "side" (a complete narrow band: old data) or "partial" (cut, narrow)
    written_width: float | None = None  # [rows] between the half crossings of the unsmoothed activity

    @property
    def is_track(self) -> bool:
        return self.kind == "track"

    @property
    def complete(self) -> bool:
        return self.lower is not None and self.upper is not None

    @property
    def width(self) -> float | None:
        return None if not self.complete else self.upper - self.lower

    @property
    def centre(self) -> float | None:
        return None if not self.complete else 0.5 * (self.lower + self.upper)


@dataclass(frozen=True)
class TrackLayout:
    activity: np.ndarray         # (rows,) noise-corrected rms of down-track differences
    bands: tuple[Band, ...]
    erase_bands_px: tuple[float, ...]  # one per track side that faces a side band
    background: float            # activity between bands
    contrast: float              # (plateau - background) / plateau of the strongest band

    @property
    def tracks(self) -> tuple[Band, ...]:
        return tuple(b for b in self.bands if b.is_track)

    @property
    def regularity(self) -> float:
        """Fraction of the rows inside complete tracks, less the spread (coefficient of variation) of their
        widths: about 0.75 for written tracks read along them, below 0.45 for the same images read across them
        (synthetic tracks; the across-track reading finds short, irregular bands)."""
        widths = np.array([b.width for b in self.tracks if b.complete])
        if widths.size == 0:
            return -1.0
        cover = float(widths.sum()) / self.activity.size
        return float(cover - (widths.std() / widths.mean() if widths.size > 1 else 0.0))


def _crossing(profile: np.ndarray, start: int, stop: int, level: float) -> float | None:
    """First crossing of ``level`` walking from row ``start`` towards ``stop`` (linear interpolation)."""
    step = 1 if stop > start else -1
    for i in range(start, stop, step):
        a, b = profile[i], profile[i + step]
        if (a - level) * (b - level) <= 0 and a != b:
            return i + step * (a - level) / (a - b)
    return None


def _gaussian_nearest(x: np.ndarray, sigma: float) -> np.ndarray:
    """A 1-D Gaussian smoothing of ``x``, the edge values repeated beyond the ends: ``scipy.ndimage``'s
    ``gaussian_filter1d(x, sigma, mode="nearest")`` (its kernel, truncated at 4 sigma; checked against it in the
    tests), written here because loading scipy.ndimage costs 0.17 s of a 0.65 s ``mfma analyze image``."""
    radius = int(4.0 * sigma + 0.5)
    offsets = np.arange(-radius, radius + 1)
    kernel = np.exp(-0.5 * (offsets / sigma) ** 2)
    kernel /= kernel.sum()
    return np.convolve(np.pad(x, radius, mode="edge"), kernel, mode="valid")


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """(first, last) index of every run of True in a 1-D mask, in order."""
    edges = np.flatnonzero(np.diff(np.r_[0, mask.astype(np.int8), 0]))
    return [(int(a), int(b) - 1) for a, b in zip(edges[::2], edges[1::2])]


def find_tracks(image: np.ndarray, *, noise: float, min_contrast: float = 0.5) -> TrackLayout | None:
    """Bands of down-track activity of an image whose rows run along the tracks; None when there are none
    (no band stands above the background by ``min_contrast`` of its level and above twice the noise)."""
    u = np.asarray(image, float)
    d = np.diff(u, axis=1)
    power = np.mean(d * d, axis=1) - 2.0 * noise**2  # a difference of two pixels carries twice the noise
    act = np.sqrt(np.clip(_gaussian_nearest(power, 1.0), 0.0, None))
    # the written width from each row's activity as it is: the power smoothed across a sharp edge is half the
    # plateau's there, whose root is 0.71, which moves both half crossings out (synthetic 380 nm tracks read
    # 385 nm, the simulated stage's 440 nm ones 458 nm; unsmoothed 380 and 440 nm). The bands keep the smoothed
    # edges, with which the transition fits were measured
    amp = np.sqrt(np.clip(power, 0.0, None))
    hi = float(np.percentile(act, 90))
    lo = float(np.percentile(act, 5))
    # bands must stand out from the background and from the noise (the activity of pure noise scatters about
    # zero by ~0.4 noise over a few hundred pixels; a track's transitions are many times the noise)
    if not hi > 2.0 * noise or (hi - lo) < min_contrast * hi:
        return None
    half = 0.5 * (lo + hi)
    above = act > half
    rows = act.size
    raw = []
    for first, last in _runs(above):
        plateau = float(np.median(act[first:last + 1]))
        raw.append((first, last, plateau))
    if not raw:
        return None
    bands: list[Band] = []
    for j, (first, last, plateau) in enumerate(raw):
        # walk out from the band's strongest row to half its plateau (the activity has the noise taken out, so
        # its floor is zero; a neighbouring band's blurred edge would lift a floor taken from the dip)
        peak = first + int(np.argmax(act[first:last + 1]))
        below = raw[j - 1][1] if j > 0 else 0  # the walks stop at the neighbouring bands
        above = raw[j + 1][0] if j + 1 < len(raw) else rows - 1
        lower = _crossing(act, peak, below, 0.5 * plateau) if first > 0 else None
        upper = _crossing(act, peak, above, 0.5 * plateau) if last < rows - 1 else None
        written = None
        if lower is not None and upper is not None:
            half = 0.5 * float(np.median(amp[first:last + 1]))
            lo_w, hi_w = _crossing(amp, peak, below, half), _crossing(amp, peak, above, half)
            written = None if lo_w is None or hi_w is None else hi_w - lo_w
        bands.append(Band(lower, upper, first, last, plateau, "track", written))
    complete = [b.width for b in bands if b.complete]
    widest = max(complete) if complete else max(b.last_row - b.first_row + 1 for b in bands)
    marked = []
    for b in bands:
        # a narrow band cut by the image's edge may be old data or a track seen in part: it is left out
        visible = b.width if b.complete else b.last_row - b.first_row + 1
        kind = "track" if visible >= 0.6 * widest else ("side" if b.complete else "partial")
        marked.append(replace(b, kind=kind))
    erase = []
    for j, b in enumerate(marked):
        if not b.is_track:
            continue
        for nb, side in ((marked[j - 1] if j > 0 else None, "lower"), (marked[j + 1] if j + 1 < len(marked)
                                                                      else None, "upper")):
            if nb is None or nb.kind != "side":
                continue
            if side == "lower" and b.lower is not None and nb.upper is not None:
                erase.append(b.lower - nb.upper)
            elif side == "upper" and b.upper is not None and nb.lower is not None:
                erase.append(nb.lower - b.upper)
    return TrackLayout(act, tuple(marked), tuple(e for e in erase if e > 0), lo,
                       float((hi - lo) / hi))
