"""Plain yardstick of `mfma analyze thermal`: Welch spectrum (scipy.signal) and a least-squares fit of the
oscillator plus white and 1/f background (scipy.optimize); k from the peak area with the Butt-Jaschke factor
0.817 (Butt & Jaschke 1995, Nanotechnology 6, 1) and the given InvOLS."""
import json
import sys

import numpy as np
import scipy.optimize
import scipy.signal

KB, T = 1.380649e-23, 298.15
x = np.load(sys.argv[1], mmap_mode="r")
rate, invols = float(sys.argv[2]), float(sys.argv[3]) * 1e-9
nperseg = int(min(2**18, 2 ** int(np.floor(np.log2(x.size / 8)))))
f, p = scipy.signal.welch(x, rate, window="hann", nperseg=nperseg)
i = int(np.argmax(np.where(f > 1e3, p, 0)))
sel = (f > 0.95 * f[i]) & (f < 1.05 * f[i])
b0 = float(np.median(p[sel]))


def model(f, f0, q, a0, b, c):
    u = f / f0
    return a0 / ((1 - u * u) ** 2 + (u / q) ** 2) + b + c / f


popt, pcov = scipy.optimize.curve_fit(model, f[sel], p[sel], p0=[f[i], 200.0, (p[i] - b0) / 4e4, b0, 0.0],
                                      sigma=p[sel], maxfev=20000)
area = np.pi * popt[2] * popt[1] * popt[0] / 2
print(json.dumps({"f0_hz": popt[0], "q": popt[1], "k_n_per_m": 0.817434 * KB * T / (invols**2 * area)}))
