"""Plain yardstick of `mfma analyze loop`: a field series of a dot array (numpy and scipy.ndimage).

Every step is registered to the first by phase correlation (FFT) and shifted back by whole pixels; the elements
are the connected regions of the mean |image| above half its range (scipy.ndimage.label); each element's contrast
at each step is its mean minus the image mean; its state the sign of that contrast; its switching fields the
fields where the state first changes on the descending and on the ascending branch; the coercive field and the
switching-field distribution the mean and standard deviation of |H_sw|.
"""
import json
import sys

import numpy as np
from scipy import ndimage

z = np.load(sys.argv[1])
stack, fields = z["phase_deg"].astype(float), z["field_ka_per_m"] * 1e3
n, rows, cols = stack.shape
ref = np.conj(np.fft.rfft2(stack[0] - stack[0].mean()))
aligned = np.empty_like(stack)
for i in range(n):
    img = stack[i] - stack[i].mean()
    corr = np.fft.irfft2(np.fft.rfft2(img) * ref, s=(rows, cols))
    dr, dc = np.unravel_index(int(np.argmax(corr)), corr.shape)
    aligned[i] = np.roll(img, (-dr, -dc), axis=(0, 1))
mean_abs = np.abs(aligned).mean(axis=0)
labels, count = ndimage.label(mean_abs > mean_abs.min() + 0.5 * np.ptp(mean_abs))
index = np.arange(1, count + 1)
contrast = np.array([ndimage.mean(a, labels, index) - a.mean() for a in aligned])  # (steps, elements)
states = np.sign(contrast - np.median(contrast, axis=1, keepdims=True))
turn = int(np.argmin(fields))
switching = []
for branch in (slice(0, turn + 1), slice(turn, n)):
    s, h = states[branch], fields[branch]
    changed = s != s[0]
    first = np.where(changed.any(axis=0), changed.argmax(axis=0), -1)
    switching.append(np.where(first >= 0, np.abs(h[np.maximum(first, 0)]), np.nan))
hsw = np.concatenate(switching)
print(json.dumps({"elements": int(count), "coercive_field_ka_per_m": float(np.nanmean(hsw)) / 1e3,
                  "sfd_sigma_ka_per_m": float(np.nanstd(hsw)) / 1e3}))
