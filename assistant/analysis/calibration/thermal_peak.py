"""Where the thermal peak is: the automatic search of :func:`.thermal_fit.fit_thermal_spectrum`.

The spectrum is averaged on log-spaced bins and compared with its running median; the runs of bins that stand out
are the candidates. A sine (mains, a switching supply, a neighbouring drive) is a line: in a Welch spectrum with a
Hann window it fills the window's main lobe, whose half-power width is 1.44 bins (Harris 1978, Proc. IEEE 66, 51),
so nearly all its excess power sits within two bins of its highest one. A damped resonance resolved by the
spectrum spreads its power over its full width: a Lorentzian of FWHM w bins holds (2/pi) atan(5/w) of its area
within +-2.5 bins (0.5 for w = 5). Candidates whose excess power is mostly in those five bins are lines; among the
others the largest excess area is the resonance (a ratio to the background would favour a tall, narrow line).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage

from assistant.errors import AssistantError

__all__ = ["LINE_FRACTION", "Peak", "ThermalFitError", "find_peak", "pick_resonance"]

LINE_FRACTION = 0.85  # share of the excess within +-2 bins above which a peak is a line (from the bounds above)
_CORE_BINS = 2
_MARGIN_BINS = 20


class ThermalFitError(AssistantError, ValueError):
    """The thermal record or spectrum cannot be fitted (the message names the quantity and the limit)."""


@dataclass(frozen=True)
class Peak:
    f0_hz: float
    fwhm_hz: float
    height_v2_per_hz: float
    background_v2_per_hz: float


_PER_DECADE = 400  # log-spaced bins per decade for the peak search
_MIN_Z = 10.0  # significance of a log bin above the running-median background
_MIN_RATIO = 1.3  # and its ratio to it (common practice, no source)
_HALF_LOG_BIN = np.log(10) / _PER_DECADE / 2


def _hz_list(freqs: list[float]) -> str:
    return ", ".join(f"{x:.6g} Hz" for x in freqs[:5])


def find_peak(f: np.ndarray, p: np.ndarray, *, averages: float, f0_guess_hz: float | None) -> Peak:
    """Locate the resonance as the log-frequency bin standing most above a running-median background."""
    df = float(f[1] - f[0])
    valid = f >= 5 * df
    fv, pv = f[valid], p[valid]
    if fv.size < 16:
        raise ThermalFitError(f"spectrum has {fv.size} usable bins, need >= 16")
    n_bins = max(int(np.ceil(np.log10(fv[-1] / fv[0]) * _PER_DECADE)), 1)
    edges = np.geomspace(fv[0], fv[-1] * (1 + 1e-12), n_bins + 1)
    idx = np.clip(np.searchsorted(edges, fv, side="right") - 1, 0, n_bins - 1)
    counts = np.bincount(idx, minlength=n_bins)
    sums = np.bincount(idx, pv, minlength=n_bins)
    keep = counts > 0
    mean, cnt = sums[keep] / counts[keep], counts[keep]
    centres = np.sqrt(edges[:-1] * edges[1:])[keep]
    bg = scipy.ndimage.median_filter(mean, size=_PER_DECADE // 2 + 1, mode="nearest")
    bg = np.maximum(bg, np.finfo(float).tiny)
    ratio = mean / bg
    if f0_guess_hz is None:
        # Hann bins are correlated (about half the information per bin): hence the factor 2.
        z = (ratio - 1.0) * np.sqrt(averages * cnt / 2.0)
        # Skip the lowest 0.3 decade of a wide spectrum: there the running median of a steep 1/f rise is
        # one-sided and would fake an excess.
        low = fv[0] * 10**0.3 if fv[-1] / fv[0] > 10**1.5 else fv[0]
        cand = (centres >= low) & (z >= _MIN_Z) & (ratio >= _MIN_RATIO)
        if not np.any(cand):
            raise ThermalFitError(
                f"no resonance peak stands out of the background: largest excess {np.max(z):.3g} standard "
                f"errors (need >= {_MIN_Z}) at ratio >= {_MIN_RATIO}")
        where = np.flatnonzero(cand)
        runs = np.split(where, np.flatnonzero(np.diff(where) > 1) + 1)
        tops = [int(r[np.argmax(ratio[r])]) for r in runs]  # each run of candidate log bins: its tallest bin
        chosen, lines = pick_resonance(f, p, [(centres[r[0]] * (1 - _HALF_LOG_BIN), centres[r[-1]] *
                                               (1 + _HALF_LOG_BIN), float(bg[t])) for r, t in zip(runs, tops)])
        if chosen is None:
            raise ThermalFitError(f"only narrow lines stand out of the background (at {_hz_list(lines)}): "
                                  "interference, or a resonance narrower than the bins; give the resonance "
                                  "frequency to start from (f0 guess)")
        i = tops[chosen]
        centre, reach = centres[i], 3 * np.log(10) / _PER_DECADE
    else:
        if not fv[0] < f0_guess_hz < fv[-1]:
            raise ThermalFitError(
                f"f0_guess_hz = {f0_guess_hz!r} outside the spectrum {fv[0]:.6g}..{fv[-1]:.6g} Hz")
        centre, reach = float(f0_guess_hz), 0.05
        i = int(np.argmin(np.abs(centres - centre)))
    background = float(bg[i])
    near = np.flatnonzero((f >= centre * (1 - reach)) & (f <= centre * (1 + reach)) & (f >= 5 * df))
    if near.size == 0:
        near = np.array([int(np.argmin(np.abs(f - centre)))])
    width = 5
    for _ in range(4):  # smooth over about a quarter of the width found so far: robust height and FWHM
        smooth = np.convolve(p, np.ones(width) / width, mode="same")
        k = int(near[np.argmax(smooth[near])])
        height = float(smooth[k])
        half = background + 0.5 * (height - background)
        left = k
        while left > 0 and smooth[left] > half:
            left -= 1
        right = k
        while right < f.size - 1 and smooth[right] > half:
            right += 1
        fwhm = max(float(f[right] - f[left]) - df, df)
        new_width = int(min(max(5, fwhm / df / 4), max(5, f.size // 20))) | 1
        if new_width <= width:
            break
        width = new_width
    return Peak(float(f[k]), fwhm, height, background)


def pick_resonance(f: np.ndarray, p: np.ndarray, regions: list[tuple[float, float, float]]) -> tuple[int | None,
                                                                                                   list[float]]:
    """Index of the region holding the resonance, and the frequencies [Hz] of the lines set aside.

    ``regions``: (low, high, background) per candidate: its frequency span [Hz] and the background level
    [V^2/Hz] under it. None when every candidate is a line.
    """
    df = float(f[1] - f[0])
    best, best_area, lines = None, -np.inf, []
    for n, (lo, hi, background) in enumerate(regions):
        sel = np.flatnonzero((f >= lo - _MARGIN_BINS * df) & (f <= hi + _MARGIN_BINS * df))
        if sel.size == 0:
            continue
        excess = p[sel] - background
        k = int(np.argmax(p[sel]))
        core = float(np.sum(excess[max(k - _CORE_BINS, 0): k + _CORE_BINS + 1]))
        total = float(np.sum(excess))
        if total <= 0 or core >= LINE_FRACTION * total:
            lines.append(float(f[sel[k]]))
            continue
        if total > best_area:
            best, best_area = n, total
    return best, lines
