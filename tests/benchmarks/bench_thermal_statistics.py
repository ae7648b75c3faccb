"""Statistical quality of the thermal k over many seeds: bias and spread against the statistical limit.

Records are white Gaussian noise shaped in the frequency domain to the one-sided oscillator spectrum plus
white (1 % of the peak) and 1/f background. The limit for the relative SD of k from T seconds is
sqrt(Q / (pi f0 T)) (mean square of an oscillator with amplitude decay rate pi f0 / Q; see
Norrelykke & Flyvbjerg 2010, Rev. Sci. Instrum. 81, 075103 for the maximum-likelihood fit).
"""

from __future__ import annotations

import sys
import time

import numpy as np

from assistant.analysis.constants import BOLTZMANN_J_PER_K
from assistant.analysis.calibration import analyse_thermal_record

CASES = {  # name: (f0 [Hz], Q, rate [Hz], samples)
    "75kHz_Q200": (75e3, 200.0, 1e6, 2**22),
    "13kHz_Q30": (13e3, 30.0, 2.5e5, 2**20),
}
K, T, INVOLS = 2.8, 298.15, 50e-9


def _psd_fn(f0, q):
    a0 = 2 * 0.817434 * BOLTZMANN_J_PER_K * T / (K * INVOLS**2) / (np.pi * q * f0)
    white = 0.01 * a0 * q * q

    def s(f):
        u = f / f0
        out = a0 / ((1 - u * u) ** 2 + (u / q) ** 2) + white
        out[1:] += white * 1e4 / f[1:]
        return out
    return s


def _series(n, fs, psd, rng):
    f = np.fft.rfftfreq(n, 1 / fs)
    s = psd(f)
    s[0] = 0
    x = np.sqrt(s * n * fs / 4) * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size))
    x[-1] = x[-1].real * np.sqrt(2)
    return np.fft.irfft(x, n).astype(np.float32)


def run(seeds: int = 100) -> dict:
    out = {}
    for name, (f0, q, fs, n) in CASES.items():
        psd = _psd_fn(f0, q)
        ks, stds, qs = [], [], []
        t0 = time.perf_counter()
        for seed in range(seeds):
            res = analyse_thermal_record(_series(n, fs, psd, np.random.default_rng(seed)), fs,
                                         invols_m_per_v=INVOLS, temperature_k=T)
            ks.append(res.k_n_per_m / K)
            stds.append(res.k_std_n_per_m / K)
            qs.append(res.q / q)
        ks = np.array(ks)
        limit = float(np.sqrt(q / (np.pi * f0 * n / fs)))
        spread = float(ks.std(ddof=1))
        out[name] = {
            "seeds": seeds, "record_s": n / fs, "k_bias": float(ks.mean() - 1),
            "k_bias_standard_error": spread / np.sqrt(seeds), "k_relative_sd": spread,
            "statistical_limit": limit, "sd_over_limit": spread / limit,
            "mean_reported_sd_over_actual": float(np.mean(stds)) / spread, "q_bias": float(np.mean(qs) - 1),
            "seconds": time.perf_counter() - t0,
        }
        # stderr: the benchmark runner keeps stdout for its JSON
        print(f"{name}: k bias {out[name]['k_bias']:+.4%} +- {out[name]['k_bias_standard_error']:.4%}, "
              f"spread/limit = {spread / limit:.3f}", file=sys.stderr)
    return out


if __name__ == "__main__":
    import json
    print(json.dumps(run(), indent=2))
