"""Full thermal analysis of a 2^24-sample float32 record versus scipy.signal.welch + scipy.optimize.curve_fit.

The record is white Gaussian noise shaped in the frequency domain to the one-sided oscillator spectrum
(f0 = 75 kHz, Q = 200, k = 2.8 N/m at 298.15 K through InvOLS 50 nm/V and the Butt-Jaschke factor 0.817434)
plus white and 1/f background, sampled at 2 MHz. Both pipelines use the same segment length and fit model;
times are wall-clock (best of ``repeats``), memory is the tracemalloc peak during the call.
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np
import scipy.optimize
import scipy.signal

from assistant.analysis.constants import BOLTZMANN_J_PER_K
from assistant.analysis.calibration import analyse_thermal_record, default_segment_length

FS, N, F0, Q, K, T, INVOLS = 2e6, 2**24, 75e3, 200.0, 2.8, 298.15, 50e-9


def _record(seed: int = 0) -> np.ndarray:
    a0 = 2 * 0.817434 * BOLTZMANN_J_PER_K * T / (K * INVOLS**2) / (np.pi * Q * F0)
    f = np.fft.rfftfreq(N, 1 / FS)
    u = f / F0
    s = a0 / ((1 - u * u) ** 2 + (u / Q) ** 2) + 0.01 * a0 * Q * Q
    s[1:] += 0.01 * a0 * Q * Q * 1e4 / f[1:]
    s[0] = 0
    rng = np.random.default_rng(seed)
    x = np.sqrt(s * N * FS / 4) * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size))
    return np.fft.irfft(x, N).astype(np.float32)


def _model(f, f0, q, a0, b, c):
    u = f / f0
    return a0 / ((1 - u * u) ** 2 + (u / q) ** 2) + b + c / f


def _reference(x: np.ndarray, nperseg: int) -> float:
    f, p = scipy.signal.welch(x, FS, window="hann", nperseg=nperseg, scaling="density")
    i = int(np.argmax(np.where(f > 1e3, p, 0)))
    f0 = f[i]
    sel = (f > f0 * 0.95) & (f < f0 * 1.05)
    b0 = float(np.median(p[sel]))
    popt, _ = scipy.optimize.curve_fit(_model, f[sel], p[sel], p0=[f0, 200.0, (p[i] - b0) / 4e4, b0, 0.0],
                                       sigma=p[sel], maxfev=20000)
    area = np.pi * popt[2] * popt[1] * popt[0] / 2
    return float(0.817434 * BOLTZMANN_J_PER_K * T / (INVOLS**2 * area))


def _measure(fn, repeats):
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    tracemalloc.start()
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return best, peak, out


def run(repeats: int = 3) -> dict:
    x = _record()
    nperseg = default_segment_length(x.size)
    ours_s, ours_peak, res = _measure(lambda: analyse_thermal_record(x, FS, invols_m_per_v=INVOLS,
                                                                     temperature_k=T), repeats)
    ref_s, ref_peak, k_ref = _measure(lambda: _reference(x, nperseg), repeats)
    # Constant memory: the same analysis of a quarter of the record must peak at the same memory.
    quarter = x[: N // 4]
    _, ours_peak_quarter, _ = _measure(lambda: analyse_thermal_record(quarter, FS, invols_m_per_v=INVOLS,
                                                                      segment_length=nperseg), 1)
    return {
        "samples": N, "dtype": "float32", "record_mib": x.nbytes / 2**20, "segment_length": nperseg,
        "ours_s": ours_s, "welch_curve_fit_s": ref_s, "speed_ratio_reference_over_ours": ref_s / ours_s,
        "ours_peak_mib": ours_peak / 2**20, "ours_peak_mib_quarter_record": ours_peak_quarter / 2**20,
        "welch_curve_fit_peak_mib": ref_peak / 2**20,
        "k_ours_n_per_m": res.k_n_per_m, "k_std_ours_n_per_m": res.k_std_n_per_m,
        "k_welch_curve_fit_n_per_m": k_ref, "k_true_n_per_m": K,
    }


if __name__ == "__main__":
    import json
    print(json.dumps(run(), indent=2))
