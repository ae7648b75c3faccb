"""Track metrics from the fitted transitions: bit length, jitter, pitch, width, erase band, transition width.

Bit length: the tracks' bit lengths weighted by their standard errors, the standard error widened by the tracks'
scatter when it exceeds them. Jitter: the deviations from each track's grid pooled (two grid parameters per track
out of the degrees of freedom; deviations beyond four robust standard deviations left out as misplaced
transitions), then the fit's own position noise taken out: each deviation has variance
J^2 + s_i^2 (s_i its position's standard error), solved for J by weighted moments (iterated). s_i is the fit's
statistical error only: on synthetic tracks the positions scattered about the written ones by 0.8-3.5 times it
(the transition model's own error is not in it), so the jitter is an upper bound. Pitch: the median
spacing of complete tracks' centres, each spacing divided by the whole number of pitches it spans (a track too
weak to stand out from the old data beside it is not found), counted in the period of the across-track activity
profile. Width: the mean of complete tracks' widths.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from .bit_grid import BitGrid, fit_bit_grid
from .tracks import TrackAnalysis, TrackResult, no_tracks, raise_too_few


def activity_period(activity: np.ndarray) -> float | None:
    """Period [px] of the across-track activity profile: the first peak of its autocorrelation past the first
    zero crossing that reaches 60 % of the highest there (tracks repeat every pitch, whether or not each stands
    out; the multiples of the period peak about as high), or None without one. The 60 %: a rule of thumb."""
    a = np.asarray(activity, float) - float(np.mean(activity))
    n = a.size
    acf = np.correlate(a, a, mode="full")[n - 1:] / np.arange(n, 0, -1)  # mean product at each lag
    below = np.flatnonzero(acf[: n // 2] < 0)
    if below.size == 0:
        return None
    lags = np.arange(int(below[0]), n // 2)
    inner = lags[(lags > 0) & (lags < n // 2 - 1)]
    peaks = inner[(acf[inner] >= acf[inner - 1]) & (acf[inner] >= acf[inner + 1]) & (acf[inner] > 0)]
    if peaks.size == 0:
        return None
    k = int(peaks[np.argmax(acf[peaks] >= 0.6 * acf[peaks].max())])
    den = acf[k - 1] - 2 * acf[k] + acf[k + 1]  # parabola through the peak's neighbours
    return float(k + (0.5 * (acf[k - 1] - acf[k + 1]) / den if den < 0 else 0.0))


def jitter_without_position_noise(dev: np.ndarray, sd: np.ndarray, dof_factor: float = 1.0) -> float:
    """J with Var(dev_i) = J^2 + sd_i^2: weighted moment equation, weights 1 / (J^2 + sd_i^2)^2, iterated; at most
    the raw rms (taking noise out cannot add jitter: where the large deviations sit on the precisely placed
    transitions, the weights alone would lift J above it)."""
    d2 = dev**2 * dof_factor
    s2 = sd**2
    j2 = max(float(np.mean(d2 - s2)), 0.0)
    for _ in range(20):
        w = 1.0 / (j2 + s2 + 1e-300) ** 2
        new = max(float(np.sum(w * (d2 - s2)) / np.sum(w)), 0.0)
        if abs(new - j2) <= 1e-6 * max(j2, 1e-300):
            j2 = new
            break
        j2 = new
    return float(np.sqrt(min(j2, float(np.mean(d2))))) if d2.size else 0.0


def _closer_to_clock(grid: BitGrid | None, again: BitGrid | None, hint: float) -> BitGrid | None:
    """A track's own grid if its cell is within 2 % of the clock's, else the better of it and ``again`` (the
    track fitted again near the clock)."""
    if grid is not None and abs(grid.bit_length / hint - 1) <= 0.02:
        return grid
    if grid is None or (again is not None and again.jitter <= grid.jitter):
        return again
    return grid


def _clock(positions: list[np.ndarray], found: list[BitGrid], min_cell: float = 0.0
           ) -> tuple[float, list[BitGrid | None]]:
    """The write clock's cell: of the cells the tracks' own grids found, the one whose grid, fitted again near it
    on every track, holds the most transitions coherently (the sum over the tracks of the coherence times the
    transitions on the grid); and those grids. A few transitions can fit a wrong cell on one track; the others
    then hold it poorly. (The clock used to be the cell of the track whose profile fitted best: with 8 nm jitter
    on 80 nm cells, 7 of 60 synthetic images then read a wrong bit length, 38-255 nm.) Cells shorter than
    ``min_cell`` are candidates only when no track found a longer one: with seven or eight transitions a track,
    a short cell can hold nearly all of them by chance, and the image would be refused as too coarsely sampled
    while its tracks agree on a cell that is not."""
    cells = sorted({g.bit_length for g in found})
    if any(c >= min_cell for c in cells):
        cells = [c for c in cells if c >= min_cell]
    scored = []
    for cell in cells:
        near = [fit_bit_grid(x, bit_length_hint=cell) for x in positions]
        support = sum(g.coherence * np.count_nonzero(~g.off_grid) for g in near
                      if g is not None and abs(g.bit_length / cell - 1) <= 0.1)
        scored.append((support, cell, near))
    best = max(scored, key=lambda c: c[0])
    # a half or a third of the clock's cell holds every transition the cell holds, and a spurious one between
    # them besides, so it can win the support: as in fit_bit_grid, the clock is the longest cell, a whole multiple
    # of the winner's, that keeps 80 % of its support (the 80 % a rule of thumb, no source; one misplaced
    # transition on one track made a 40 nm half cell win over the 80 nm cell the other track held exactly)
    for support, cell, near in sorted(scored, key=lambda c: c[1], reverse=True):
        ratio = cell / best[1]
        if ratio > 1.5 and abs(ratio - np.rint(ratio)) <= 0.05 * ratio and support >= 0.8 * best[0]:
            best = (support, cell, near)
            break
    return float(best[1]), best[2]


def _seeded_at_width(f) -> bool:
    """Whether a fit's seeds were detected at (within 30 % of) the width it found."""
    return f.seed_width_px is None or abs(f.seed_width_px / f.width_px - 1.0) <= 0.3


def summarise(orient, model_orientation, model_chosen_by_fit, layout, fits, pix, shape, along_rows, skew, px_down,
               px_across, lift_m, have_tip, min_pixels_per_bit, cores=None, amplitude_m=None) -> TrackAnalysis:
    """The combined numbers. Each track's positions were fitted on its core rows straightened about the core's
    centre row, so they and the grid phase are where that row has them in the image."""
    grids: list[BitGrid | None] = []
    for _, f in fits:  # cells shorter than 2 pixels cannot be resolved: no shorter grid is considered
        grids.append(fit_bit_grid(f.positions_px[f.interior], min_bit=2.0))
    found = [g for g in grids if g is not None]
    if not found:
        return no_tracks(orient, pix, shape, "Tracks were found but no bit-cell grid fits their transitions: the "
                          "media metrics are null.")
    # the tracks of one image share the write clock: a track whose cell differs from it (a few transitions can
    # fit a wrong cell) is fitted again near it, and the better grid stays
    hint, near_clock = _clock([f.positions_px[f.interior] for _, f in fits], found, min_pixels_per_bit)
    grids = [_closer_to_clock(g, again, hint) for g, again in zip(grids, near_clock)]
    if hint < min_pixels_per_bit:
        raise_too_few(hint * px_down, px_down, min_pixels_per_bit)
    # tracks whose cell still disagrees with the clock by more than 10 % (a track whose fit went wrong
    # and placed transitions where there are none) are left out of the combined numbers, and said so; their
    # deviations are not shown as such
    agree = [g is not None and abs(g.bit_length / hint - 1) <= 0.1 for g in grids]
    results = []
    for i, ((band, f), g) in enumerate(zip(fits, grids)):
        sel = f.interior
        pos = (f.positions_px[sel] + 0.5) * px_down
        dev = g.deviations * px_down if g is not None and agree[i] else np.full(pos.size, np.nan)
        centre = None if band.centre is None else (band.centre + 0.5) * px_across
        edges = tuple(None if e is None else (e + 0.5) * px_across for e in (band.lower, band.upper))
        results.append(TrackResult(
            i, centre, None if band.width is None else band.width * px_across, edges,
            None if g is None else g.bit_length * px_down, None if g is None else g.bit_length_std * px_down,
            None if g is None else (g.phase + 0.5) * px_down,
            None if g is None else g.jitter * px_down,
            pos, f.positions_std_px[sel] * px_down, dev, f.signs[sel], f.width_px * px_down,
            None if g is None else g.off_grid,
            None if not cores or id(band) not in cores else ((cores[id(band)][0] + 0.5) * px_across,
                                                               cores[id(band)][1] * px_across)))
    good = [(r, g) for (r, g), ok in zip(zip(results, grids), agree) if ok and np.isfinite(g.bit_length_std)
            and g.bit_length_std > 0]
    outliers = [r.index for r, ok, g in zip(results, agree, grids) if not ok and g is not None]
    if not good:
        return no_tracks(orient, pix, shape, "Tracks were found but no bit-cell grid fits their transitions: the "
                         "media metrics are null.")
    b = np.array([r.bit_length_m for r, _ in good])
    s = np.array([r.bit_length_std_m for r, _ in good])
    wts = 1.0 / s**2
    bit = float(np.sum(wts * b) / np.sum(wts))
    bit_sd = float(1.0 / np.sqrt(np.sum(wts)))
    if b.size > 1:  # the tracks' scatter, when it exceeds what their standard errors allow
        chi2 = float(np.sum(wts * (b - bit) ** 2) / (b.size - 1))
        bit_sd *= max(1.0, np.sqrt(chi2))
    on = [~g.off_grid for _, g in good]
    # a transition placed where there is none (near a track's end, at high noise) can still lie within 30 % of a
    # cell: deviations beyond four robust standard deviations of all the tracks' (1.4826 MAD, textbook) are not
    # jitter either (at five times the default noise they made the jitter read up to 2.6x the written value)
    pooled = np.concatenate([g.deviations[o] for (_, g), o in zip(good, on)])
    if pooled.size >= 8:
        robust = 1.4826 * float(np.median(np.abs(pooled - np.median(pooled))))
        on = [o & (np.abs(g.deviations) <= max(4.0 * robust, 0.01 * g.bit_length)) for (_, g), o in zip(good, on)]
    used = {r.index: o for (r, _), o in zip(good, on)}  # shown as such in the figures and the JSON
    results = [replace(r, in_jitter=used.get(r.index, np.zeros(r.positions_m.size, bool))) for r in results]
    dev_all = np.concatenate([g.deviations[o] for (_, g), o in zip(good, on)]) * px_down
    sd_all = np.concatenate([r.positions_std_m[o] for (r, _), o in zip(good, on)])
    dof_factor = dev_all.size / max(sum(max(int(o.sum()) - 2, 1) for o in on), 1)
    raw = float(np.sqrt(np.mean(dev_all**2) * dof_factor))
    jitter = jitter_without_position_noise(dev_all, sd_all, dof_factor)
    pos_noise = float(np.sqrt(np.mean(sd_all**2))) if sd_all.size else 0.0
    n_off = int(sum(int((~o).sum()) for o in on))
    # the detector's pull is measured only where it assumed the width the fit found (within 30 %): a track fitted
    # again from seeds detected at another width (track_fit) has seeds shifted by that width, not by neighbours
    # (one such track read 3.4 px rms and made the image's 2.1 nm read 9.2 nm)
    shift = np.concatenate([(f.detected_px[f.interior] - f.positions_px[f.interior])
                            for (_, f), ok in zip(fits, agree)
                            if ok and _seeded_at_width(f)] or [np.zeros(0)]) * px_down
    inter = float(np.sqrt(np.mean(shift**2))) if shift.size else None
    complete = [bd for bd in layout.tracks if bd.complete]  # every track band, with or without fitted transitions
    centres = np.array([bd.centre for bd in complete]) * px_across
    widths = np.array([bd.width if bd.written_width is None else bd.written_width for bd in complete]) * px_across
    pitch = pitch_sd = None
    skipped = 0
    if centres.size >= 2:
        d = np.diff(np.sort(centres))
        # a track whose activity does not stand out from the old data beside it is not found, and leaves a gap
        # of two or more pitches: each gap counts as the whole number of pitches nearest to it, the pitch measured
        # by the activity profile's period (tracks repeat every pitch, found or not; a period shorter than the
        # tracks' width is a harmonic) or else by the smallest gap, and the pitch is the median gap per pitch
        period = activity_period(layout.activity)
        period = None if period is None else period * px_across
        unit = period if period and widths.mean() < period < 1.1 * d.min() else d.min()
        multiple = np.maximum(np.rint(d / unit), 1.0)
        skipped = int(np.sum(multiple - 1))
        d = d / multiple
        pitch = float(np.median(d))
        pitch_sd = float(np.std(d, ddof=1) / np.sqrt(d.size)) if d.size > 1 else None
    width = float(widths.mean()) if widths.size else None
    # the scatter between tracks, and each edge interpolated between rows the profile does not resolve (taken as
    # uniform over a row spacing: a rule of thumb, no source): written alike, tracks scatter by 0.1 nm, while old
    # data 20-40 nm beside them lift the edges by up to 3 nm on 8 nm rows (synthetic)
    scatter = float(widths.std(ddof=1) / np.sqrt(widths.size)) if widths.size > 1 else 0.0
    width_sd = float(np.hypot(scatter, px_across / np.sqrt(6.0))) if widths.size else None
    erase_px = [e for e in layout.erase_bands_px  # within the space between two tracks; wider runs over one missed
                if pitch is None or width is None or e * px_across < 0.5 * (pitch - width)]
    erase = float(np.mean(erase_px)) * px_across if erase_px else None
    # the shape was fitted on one track (the others hold it, unless their own fit had to move it): w and its
    # standard error from a freely shaped track whose grid agrees with the clock
    free = [f for (_, f), ok in zip(fits, agree) if ok and f.width_std_px > 0]
    shaped = min(free, key=lambda f: f.width_std_px) if free else max((f for _, f in fits),
                                                                       key=lambda f: f.width_std_px)
    w_m = shaped.width_px * px_down
    tw, tw_sd, includes_tip = w_m - (lift_m or 0.0), shaped.width_std_px * px_down, not have_tip
    placed = sum(r.positions_m.size for r in results)
    sentences = [f"{len(results)} track(s) along the {'rows' if along_rows else 'columns'}, {placed} "
                 f"transitions placed by one joint fit per track ({model_orientation} transition model"
                 + (", chosen by the fit" if model_chosen_by_fit else "") + ")."]
    sentences.append(f"Bit length {bit * 1e9:.4g} ± {bit_sd * 1e9:.2g} nm; jitter {jitter * 1e9:.3g} nm rms about "
                     f"the grid ({raw * 1e9:.3g} nm before taking out the fits' statistical position noise of "
                     f"{pos_noise * 1e9:.2g} nm; their model error stays in, so this is an upper bound)"
                     + (f"; {n_off} transition(s) more than 30 % of a cell, or four robust standard deviations, off "
                        "the grid left out." if n_off else "."))
    if outliers:
        sentences.append(f"Track(s) {', '.join(str(i) for i in outliers)}: their transitions fit another cell than "
                         "the other tracks' (a fit gone wrong); left out of the combined numbers.")
    if inter is not None:
        sentences.append(f"Neighbouring transitions pulled the detected positions by {inter * 1e9:.2g} nm rms; the "
                         "joint fit removes that interaction (exact for a linear response).")
    if pitch is None:
        sentences.append("Track pitch: fewer than two complete tracks in the image.")
    elif skipped:
        sentences.append(f"{skipped} track(s) between those found did not stand out from the old data beside them "
                         "(a gap of two or more pitches): the pitch counts that gap as so many pitches, and "
                         "no metric includes the missed track(s).")
    if erase is None:
        sentences.append(f"Erase band: no side band of old data was resolved (row spacing {px_across * 1e9:.3g} nm), "
                         "so it cannot be told from the guard band.")
    elif erase < w_m:
        # measured on 120 synthetic images (tests/analysis/media/synthetic_media.py, seeds 0-59, both
        # orientations): a written 30 nm band read 16-26 nm, median 22, at 20 nm lift; the activities of the track
        # and of the old data add in power where their tails overlap
        sentences.append(f"Erase band {erase * 1e9:.3g} nm, between the half-activity edges of a track and of the "
                         f"old data beside it: narrower than the field's spread ({w_m * 1e9:.3g} nm), it reads low, "
                         "since the two bands' tails overlap in it (a written 30 nm band read 16-26 nm on synthetic "
                         "tracks at 20 nm lift).")
    lift_txt = "the lift height taken off" if lift_m else "no lift height given, so it is included"
    osc_txt = (f"; the oscillation's averaging (amplitude {amplitude_m * 1e9:.3g} nm) taken off" if amplitude_m else
               "; it includes the averaging over the cantilever's oscillation, which widens it (amplitude not given)")
    sentences.append(f"Transition width (arctan parameter) {tw * 1e9:.3g} nm, {lift_txt}{osc_txt}"
                     + ("; it still includes the tip's effective offset (give the tip's transfer function to "
                        "take it off): an upper bound." if includes_tip else "; tip transfer function taken off."))
    return TrackAnalysis(orient, True, tuple(sentences), along_rows, pix, shape, skew, tuple(results), bit, bit_sd,
                         pitch, pitch_sd, width, width_sd, jitter, raw, pos_noise, inter, tw, tw_sd, includes_tip,
                         erase, layout.activity, amplitude_m is None)
