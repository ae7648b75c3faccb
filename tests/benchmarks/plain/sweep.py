"""Plain yardstick of `mfma analyze sweep`: amplitude and phase of a driven damped oscillator fitted jointly
(scipy.optimize.least_squares) to a frequency_hz,amplitude_v,phase_deg CSV."""
import json
import sys

import numpy as np
import scipy.optimize

f, a, ph = np.loadtxt(sys.argv[1], delimiter=",", skiprows=1, unpack=True)


def residual(p):
    f0, q, a0, off = p
    u = f / f0
    den = np.sqrt((1 - u * u) ** 2 + (u / q) ** 2)
    return np.concatenate([(a0 / (q * den) - a) / a.max(),
                           (90.0 - np.degrees(np.arctan2(u / q, 1 - u * u)) + off - ph) / 90.0])


i = int(np.argmax(a))
r = scipy.optimize.least_squares(residual, [f[i], f[i] / (f[-1] - f[0]) * 2, a[i], 0.0], x_scale="jac")
print(json.dumps({"f0_hz": r.x[0], "q": r.x[1], "amplitude_v": r.x[2], "phase_offset_deg": r.x[3]}))
