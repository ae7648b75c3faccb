"""Joint Laplace-continuation fit (times: minimum over interleaved repeats; medians too) of 8 heights x 256 x 256 against two references.

* plain numpy: the same per-frequency least squares, fitted once with equal weights (rfft2 of the stack, the
  closed-form one-parameter solution per frequency, inverse transform); target: ours within 2x of it, although
  ours also re-estimates the noise of every height, weights by it and debiases the rms;
* per-pixel curve fitting: scipy.optimize.curve_fit of ``a exp(-h / L) + c`` to every pixel's phase against
  height (timed on a subset, extrapolated to all pixels); target: ours >= 100x faster.

Timed on a non-periodic crop with drift: the default fit of analyse_series (the per-frequency fit in the cosine
basis of the reflected scan with its noise estimate, standard errors and resolution inputs; ``ours``, with equal
weights and weighted by an earlier noise estimate), the periodic per-frequency fit, and
the windowed fit (iterative, drift in the model; an option for small scans), plus the whole analysis
(registration and drift refinement, mean parts, noise floor, recommendation). ``target_met`` says whether
the targets hold.
"""

from __future__ import annotations

import statistics
import time
import warnings

import numpy as np
from scipy.optimize import curve_fit

from assistant.analysis import lift_series as dec
from assistant.analysis.lift_series.reflected import fit_continuation_reflected
from assistant.analysis.lift_series.decomposition import analyse_series
from tests.analysis.lift_series.synthetic_series import build_series

HEIGHTS = np.array([20, 30, 40, 55, 70, 90, 110, 140]) * 1e-9


def _plain_numpy(stack, heights_m, pixel_m):
    h, rows, cols = stack.shape
    data = stack - stack.mean(axis=(1, 2), keepdims=True)
    f = np.fft.rfft2(data, axes=(-2, -1))
    q = 2 * np.pi * np.hypot(np.fft.fftfreq(rows)[:, None], np.fft.rfftfreq(cols)[None, :]) / pixel_m
    e = np.exp(-q[None] * (heights_m - heights_m[0])[:, None, None])
    amp = (e * f).sum(axis=0) / (e * e).sum(axis=0)
    return np.fft.irfft2(amp[None] * e, s=(rows, cols), axes=(-2, -1))


def _interleaved(fns, repeats=21):
    """Run the candidates in turn (so a load change on a shared machine hits both alike); min and median."""
    times = [[] for _ in fns]
    for _ in range(repeats):
        for k, fn in enumerate(fns):
            t0 = time.perf_counter()
            fn()
            times[k].append(time.perf_counter() - t0)
    return [(min(t), statistics.median(t)) for t in times]


def run() -> dict:
    s = build_series(rows=256, cols=256, heights_m=HEIGHTS, noise_deg=0.1, magnetic_scale=0.3, seed=1,
                     margin_px=64, drift_px=np.c_[np.linspace(0, 1.5, 8), np.linspace(0, -1.0, 8)])
    stack = s.phase_deg
    band = int(np.ceil((HEIGHTS[-1] - HEIGHTS[0]) / s.pixel_m)) + 4  # as analyse_series chooses it
    noise = fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=s.pixel_m, interior_px=band).noise_std
    (ours, ours_med), (weighted, _), (plain, plain_med), (periodic, _) = _interleaved([
        lambda: fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=s.pixel_m, interior_px=band),
        lambda: fit_continuation_reflected(stack, heights_m=HEIGHTS, pixel_m=s.pixel_m, interior_px=band,
                                         noise_std=noise),
        lambda: _plain_numpy(stack, HEIGHTS, s.pixel_m),
        lambda: dec.fit_continuation_periodic(stack, heights_m=HEIGHTS, pixel_m=s.pixel_m)])
    fits = []
    ((windowed, windowed_med),) = _interleaved([
        lambda: fits.append(dec.fit_continuation_windowed(stack, heights_m=HEIGHTS, pixel_m=s.pixel_m))], repeats=3)
    runs = []
    ((full, _),) = _interleaved([lambda: runs.append(analyse_series(stack, heights_m=HEIGHTS, pixel_m=s.pixel_m,
                                                                    **s.analysis_kwargs))], repeats=3)

    def model(hh, a, lam, c):
        return a * np.exp(-hh / lam) + c

    flat = stack.reshape(len(HEIGHTS), -1)
    rng = np.random.default_rng(0)
    subset = rng.choice(flat.shape[1], size=400, replace=False)
    hn = HEIGHTS * 1e9
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # poorly conditioned pixels warn; they are timed all the same
        for j in subset:  # the per-pixel reference is a Python loop by construction
            y = flat[:, j]
            try:
                curve_fit(model, hn, y, p0=(y[0] - y[-1], 40.0, y[-1]), maxfev=2000)
            except RuntimeError:
                pass
    per_pixel = (time.perf_counter() - t0) / subset.size
    curve_fit_all = per_pixel * flat.shape[1]
    out = {
        "stack": [len(HEIGHTS), 256, 256],
        "ours_fit_reflect_s": ours,
        "ours_fit_reflect_median_s": ours_med,
        "plain_numpy_lsq_s": plain,
        "ratio_ours_over_plain": ours / plain,
        "ratio_of_medians": ours_med / plain_med,
        "target_ratio_max": 2.0,
        "target_met": bool(max(ours, weighted) / plain <= 2.0 and curve_fit_all / max(ours, weighted) >= 100.0),
        "ours_weighted_fit_s": weighted,  # the same fit weighted by a noise estimate (the analysis's last fit)
        "ratio_weighted_over_plain": weighted / plain,
        "periodic_fit_s": periodic,
        "ratio_periodic_over_plain": periodic / plain,
        "windowed_fit_s": windowed,
        "windowed_fit_median_s": windowed_med,
        "windowed_cg_iterations": int(fits[-1].iterations),
        "ratio_windowed_over_plain": windowed / plain,
        "full_analyse_series_s": full,  # registration, drift refinement with the fit, mean parts, noise, advice
        "full_analysis_estimator": runs[-1].edge,  # edge="auto" kept the reflected fit or fell back to the window
        "curve_fit_per_pixel_s": per_pixel,
        "curve_fit_all_pixels_extrapolated_s": curve_fit_all,
        "speedup_vs_curve_fit": curve_fit_all / ours,
        "speedup_vs_curve_fit_full_analysis": curve_fit_all / full,
        "target_speedup_min": 100.0,
    }
    return out
