"""Plain yardstick of `mfma analyze field`: Hz at the measurement plane by Wiener deconvolution of F' with a
ring-profile TTF (from the file of the plain tip script), on a Tukey-tapered image, and its standard deviation
from 64 Monte Carlo draws of the TTF within its scatter (numpy only)."""
import json
import sys

import numpy as np

z, tip = np.load(sys.argv[1]), np.load(sys.argv[2])
k_spring, q_factor, pixel = (float(z[n]) for n in ("spring_constant_n_per_m", "quality_factor", "pixel_nm"))
grad = -k_spring * np.tan(np.radians(z["phase_deg"])) / q_factor
grad = grad - grad.mean()
rows, cols = grad.shape
pixel *= 1e-9
w = np.outer(np.hanning(rows) ** 0.25, np.hanning(cols) ** 0.25)
k = np.hypot(2 * np.pi * np.fft.fftfreq(rows, pixel)[:, None], 2 * np.pi * np.fft.rfftfreq(cols, pixel)[None, :])
ks, ttf, band = tip["k_per_m"], tip["ttf_n_per_a"], tip["band"]
t2 = np.interp(k, ks[band], ttf[band], left=0.0, right=0.0)
d = np.fft.rfft2(w * grad)
beta = 1e-3 * float(np.max(t2 ** 2))  # one Wiener constant: noise over signal power
hz = np.fft.irfft2(d * t2 / (t2 ** 2 + beta), s=grad.shape)
rng = np.random.default_rng(0)
draws = np.empty((64, rows, cols))
for i in range(64):
    tp = t2 * (1 + 0.03 * rng.standard_normal(t2.shape[1])[None, :])
    draws[i] = np.fft.irfft2(d * tp / (tp ** 2 + beta), s=grad.shape)
std = draws.std(axis=0)
np.savez(sys.argv[3], hz_a_per_m=hz, hz_std_a_per_m=std)
print(json.dumps({"hz_rms_a_per_m": float(hz.std()), "hz_std_mean_a_per_m": float(std.mean())}))
