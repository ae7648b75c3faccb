"""Plain yardstick of `mfma analyze series`: a per-frequency least-squares Laplace continuation (numpy only).

Each height's mean is removed; per spatial frequency q the stack is fitted by one amplitude times
exp(-q (h - h0)), the closed-form one-parameter least squares; the magnetic rms of each height and the
residual rms are printed.
"""
import json
import sys

import numpy as np

z = np.load(sys.argv[1])
stack, heights_m, pixel_m = z["phase_deg"].astype(float), z["heights_nm"] * 1e-9, float(z["pixel_nm"]) * 1e-9
h, rows, cols = stack.shape
data = stack - stack.mean(axis=(1, 2), keepdims=True)
f = np.fft.rfft2(data)
q = 2 * np.pi * np.hypot(np.fft.fftfreq(rows)[:, None], np.fft.rfftfreq(cols)[None, :]) / pixel_m
e = np.exp(-q[None] * (heights_m - heights_m[0])[:, None, None])
amp = (e * f).sum(axis=0) / (e * e).sum(axis=0)
model = np.fft.irfft2(amp[None] * e, s=(rows, cols))
print(json.dumps({"magnetic_rms_deg": model.std(axis=(1, 2)).tolist(),
                  "residual_rms_deg": (data - model).std(axis=(1, 2)).tolist()}))
