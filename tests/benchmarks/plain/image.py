"""Plain yardstick of `mfma analyze image`: recorded tracks along the rows of a phase image (numpy only).

Tracks: the rows whose along-row derivative has the larger variance (above the mean of it), grouped into runs;
each track's profile is the mean of the middle rows of its run; its transitions the zero crossings of the
profile about its mean (linear interpolation); the bit length from the positions against whole multiples
(least-squares line through position versus rounded index, the first guess of the spacing the lower quartile
of the gaps: with random data half the gaps are one bit); the jitter the rms of the residuals.
"""
import json
import sys

import numpy as np

z = np.load(sys.argv[1])
img, pixel = z["phase_deg"].astype(float), float(np.atleast_1d(z["pixel_nm"])[0])
activity = np.var(np.diff(img, axis=1), axis=1)
active = activity > activity.mean()
edges = np.flatnonzero(np.diff(np.r_[0, active.astype(int), 0]))
runs = [(a, b) for a, b in zip(edges[::2], edges[1::2]) if b - a >= 4]
first_guess = None
positions = []
for a, b in runs:
    m = (b - a) // 5
    profile = img[a + 2 * m: b - 2 * m].mean(axis=0)
    p = profile - profile.mean()
    i = np.flatnonzero(np.sign(p[:-1]) != np.sign(p[1:]))
    x = (i + p[i] / (p[i] - p[i + 1])) * pixel
    if x.size > 3:
        positions.append(x)
spacing = np.percentile(np.concatenate([np.diff(x) for x in positions]), 25)  # random data: most gaps are one bit
residuals, lengths = [], []
for x in positions:
    nidx = np.rint((x - x[0]) / spacing)
    coef = np.polyfit(nidx, x, 1)
    lengths.append(coef[0])
    residuals.append(x - np.polyval(coef, nidx))
print(json.dumps({"tracks": len(positions), "bit_length_nm": float(np.median(lengths)),
                  "jitter_nm": float(np.concatenate(residuals).std())}))
