"""Plain yardstick of `mfma analyze tip`: the tip transfer function from an image of a perpendicular reference
film (numpy only).

F' = -k tan(phase) / Q; the pattern is the sign of the image; the film's field per Fourier component is
Hz = 1/2 Ms (1 - exp(-k t)) exp(-k z) S(k) (Hug et al. 1998, J. Appl. Phys. 83, 5609); TTF = F' conj(Hz) /
(|Hz|^2 + alpha) on a Tukey-tapered image with alpha from a grid search of the GCV function (Golub, Heath &
Wahba 1979), its ring profile by least squares per ring, and the point-probe curve mu0 (m k^2 - q k) exp(-k delta)
(Hartmann 1999) fitted by linear least squares on a grid of delta. Writes the profile to the --out file.
"""
import json
import sys

import numpy as np

src, ms, t, out = sys.argv[1], float(sys.argv[2]) * 1e3, float(sys.argv[3]) * 1e-9, sys.argv[4]
z = np.load(src)
k_spring, q_factor, pixel, lift = (float(z[n]) for n in ("spring_constant_n_per_m", "quality_factor", "pixel_nm",
                                                        "lift_nm"))
grad = -k_spring * np.tan(np.radians(z["phase_deg"])) / q_factor
grad = grad - grad.mean()
rows, cols = grad.shape
pixel *= 1e-9


def tukey(n, a=0.2):
    w = np.ones(n)
    m = int(a * n / 2)
    ramp = 0.5 * (1 - np.cos(np.pi * np.arange(m) / m))
    w[:m], w[n - m:] = ramp, ramp[::-1]
    return w


win = np.outer(tukey(rows), tukey(cols))
ky = 2 * np.pi * np.fft.fftfreq(rows, pixel)[:, None]
kx = 2 * np.pi * np.fft.rfftfreq(cols, pixel)[None, :]
k = np.hypot(ky, kx)
pattern = np.sign(grad)
film = 0.5 * ms * -np.expm1(-k * t) * np.exp(-k * lift * 1e-9)
hz = np.fft.irfft2(np.fft.rfft2(pattern) * film, s=grad.shape)
d, h = np.fft.rfft2(win * grad), np.fft.rfft2(win * hz)
p, d2 = np.abs(h) ** 2, np.abs(d) ** 2
scale = p.mean()
gcv = [np.sum(d2 * (a / (p + a)) ** 2) / np.sum(a / (p + a)) ** 2 for a in scale * np.logspace(-9, 3, 61)]
alpha = scale * np.logspace(-9, 3, 61)[int(np.argmin(gcv))]
ttf2d = d * np.conj(h) / (p + alpha)
dk = 2 * np.pi / (max(rows, cols) * pixel)
rings = np.rint(k / dk).astype(int).ravel()
den = np.bincount(rings, p.ravel())
num = np.bincount(rings, (d * np.conj(h)).real.ravel())
ks = np.arange(den.size) * dk
ttf = np.where(den > 0, num / np.where(den > 0, den, 1), np.nan)
band = (ks > 4 * dk) & (ks < 0.5 * np.pi / pixel) & np.isfinite(ttf)
best = None
for delta in np.linspace(5e-9, 200e-9, 80):
    a = 1.25663706e-6 * np.exp(-ks[band] * delta)[:, None] * np.c_[ks[band] ** 2, -ks[band]]
    coef, res, *_ = np.linalg.lstsq(a, ttf[band], rcond=None)
    r = float(np.sum((a @ coef - ttf[band]) ** 2))
    if best is None or r < best[0]:
        best = (r, delta, coef)
np.savez(out, k_per_m=ks, ttf_n_per_a=ttf, band=band, alpha=alpha, ttf_2d=ttf2d)
print(json.dumps({"dipole_a_m2": best[2][0], "monopole_a_m": best[2][1], "offset_nm": best[1] * 1e9}))
