"""Synthetic MFM images of magnetic media, built from the published physics independently of the analysis code.

* Magnetisation: written tracks along x with random data, bit cells of length B, Gaussian jitter of every
  transition, each transition the Williams-Comstock arctan profile M(x) = (2 Ms / pi) arctan((x - x0) / a)
  (Williams & Comstock 1971, AIP Conf. Proc. 5, 738; from memory); the track of width W repeats with pitch P,
  an erase band (DC-erased, +Ms) of width E on each side of the track, the rest "old data" (random bits of
  another length) or DC-erased; out-of-plane (M_z) or in-plane along the track (M_x). Also random domains.
* Stray field per Fourier component (charge formulation; Hug et al. 1998, J. Appl. Phys. 83, 5609, from
  memory; the spacing and thickness losses of Wallace 1951, Bell Syst. Tech. J. 30, 1145):
  H_z(k, z) = 1/2 exp(-k z) (1 - exp(-k t)) [M_z(k) - i (k_x M_x(k) + k_y M_y(k)) / k], k = 0 term zero.
* Tip: point dipole m along z a distance delta behind the apex (Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53):
  F' = mu0 m k^2 exp(-k delta) H_z(k, z); phase = -arctan(Q F' / k_c) in degrees; white noise.

The map is computed on a grid ``oversample`` times finer than the image, with a margin around the image so
that the scan is a crop of a larger pattern, and sampled at the image's pixel centres.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

MU0 = 1.25663706127e-6


@dataclass(frozen=True)
class MediaImage:
    phase_deg: np.ndarray          # (rows, cols)
    pixel_m: float
    lift_m: float
    transitions: list              # per track: array of true transition positions [m] in image coordinates
    track_centres_m: np.ndarray    # y of each track's centre in image coordinates [m]
    truth: dict = field(default_factory=dict)


def tip_transfer(k, *, moment=1e-16, delta_m=30e-9):
    """Point-dipole tip: F'(k) / H_z(k) (Hartmann 1999; Lohau et al. 1999, J. Appl. Phys. 86, 3410)."""
    return MU0 * moment * k**2 * np.exp(-k * delta_m)


def _arctan_profile(x, positions, steps, a, start):
    """M / Ms along x: ``start`` then a step of ``steps[j]`` (+-2) at each position, arctan of parameter a."""
    out = np.full(x.shape, float(start))
    if len(positions):
        out = out + (steps[None, :] * (0.5 + np.arctan((x[:, None] - positions[None, :]) / a) / np.pi)).sum(axis=1)
    return out


def _bits(rng, n_cells, bit_m, phase_m, jitter_m, x_lo, x_hi):
    """Random data: transitions where consecutive bits differ, at phase + n B + jitter; returns positions and
    step signs (+2 for - -> +), the starting level, and the cell indices."""
    bits = rng.choice([-1.0, 1.0], size=n_cells)
    n0 = int(np.floor((x_lo - phase_m) / bit_m)) - 1
    idx = np.arange(n_cells) + n0
    change = np.flatnonzero(bits[1:] != bits[:-1]) + 1
    pos = phase_m + idx[change] * bit_m + rng.normal(scale=jitter_m, size=change.size)
    steps = bits[change] - bits[change - 1]
    keep = (pos > x_lo) & (pos < x_hi)
    return pos, steps, bits[0], idx[change], keep


def _oscillation(k, amplitude_m):
    """Giessibl 1997, Phys. Rev. B 56, 16010: a gradient averaged over a cycle of peak amplitude A, per component
    decaying as exp(-k z) from the closest approach, weighs 2 I1(kA) e^(-kA) / (kA) (scipy's i1e)."""
    from scipy.special import i1e

    x = k * amplitude_m
    safe = np.where(x > 0, x, 1.0)
    return np.where(x > 0, 2.0 * i1e(safe) / safe, 1.0)


def _field_phase(mz, mx, pix, lift_m, thickness_m, moment, delta_m, k_c=2.8, q=200.0, amplitude_m=0.0):
    rows, cols = mz.shape
    kx = 2 * np.pi * np.fft.fftfreq(cols, d=pix)[None, :]
    ky = 2 * np.pi * np.fft.fftfreq(rows, d=pix)[:, None]
    k = np.hypot(kx, ky)
    ks = np.where(k > 0, k, 1.0)
    charge = np.fft.fft2(mz) - 1j * kx * np.fft.fft2(mx) / ks
    hz = 0.5 * np.exp(-k * lift_m) * (1 - np.exp(-k * thickness_m)) * charge
    hz[0, 0] = 0.0
    grad = np.fft.ifft2(tip_transfer(k, moment=moment, delta_m=delta_m) * _oscillation(k, amplitude_m) * hz).real
    return -np.degrees(np.arctan(q * grad / k_c))


def track_image(*, rows=256, cols=256, pixel_m=8e-9, bit_m=80e-9, jitter_m=3e-9, transition_a_m=10e-9,
                pitch_m=500e-9, width_m=380e-9, erase_m=0.0, old_data_bit_m=None, orientation="out-of-plane",
                lift_m=20e-9, thickness_m=15e-9, ms_a_per_m=4e5, moment=1e-16, delta_m=30e-9, noise_deg=0.02,
                oversample=2, margin_px=32, seed=0, first_track_m=None, amplitude_m=0.0):
    """Written tracks along x (columns); see the module docstring (``lift_m`` is the oscillating tip's closest
    approach, ``amplitude_m`` its peak amplitude). Returns a :class:`MediaImage`."""
    rng = np.random.default_rng(seed)
    fine = pixel_m / oversample
    nr, nc = (rows + 2 * margin_px) * oversample, (cols + 2 * margin_px) * oversample
    # fine-grid nodes in image coordinates: image pixel i has its centre at (i + 1/2) pixel, on a node
    x = (np.arange(nc) - margin_px * oversample) * fine + 0.5 * pixel_m
    y = (np.arange(nr) - margin_px * oversample) * fine + 0.5 * pixel_m
    x_lo, x_hi = x[0] - 4 * bit_m, x[-1] + 4 * bit_m
    n_cells = int((x_hi - x_lo) / bit_m) + 8
    m = np.ones((nr, nc))  # DC-erased background: +Ms
    first = pitch_m * 0.5 if first_track_m is None else first_track_m
    centres = np.arange(first - 10 * pitch_m, y[-1] + pitch_m, pitch_m)
    centres = centres[(centres > y[0] - pitch_m) & (centres < y[-1] + pitch_m)]
    transitions, image_tracks, written = [], [], []
    if old_data_bit_m:
        for c in centres:  # old data between tracks, beyond the erase bands
            lo, hi = c + width_m / 2 + erase_m, c + pitch_m - width_m / 2 - erase_m
            rows_in = (y >= lo) & (y < hi)
            if not rows_in.any():
                continue
            pos, steps, start, _, _ = _bits(rng, int((x_hi - x_lo) / old_data_bit_m) + 8, old_data_bit_m,
                                            rng.uniform(0, old_data_bit_m), 0.0, x_lo, x_hi)
            m[rows_in] = _arctan_profile(x, pos, steps, transition_a_m, start)[None, :]
    for c in centres:
        rows_in = np.abs(y - c) < width_m / 2
        if not rows_in.any():
            continue
        written.append(rows_in.sum() * fine)  # the width as the fine grid holds it
        phase = rng.uniform(0, bit_m)
        pos, steps, start, _, keep = _bits(rng, n_cells, bit_m, phase, jitter_m, x_lo, x_hi)
        m[rows_in] = _arctan_profile(x, pos, steps, transition_a_m, start)[None, :]
        # erase bands: DC erased (+1) on both sides
        m[(np.abs(y - c) >= width_m / 2) & (np.abs(y - c) < width_m / 2 + erase_m)] = 1.0
        if 0 <= c < rows * pixel_m:
            inside = (pos > 0) & (pos < cols * pixel_m)
            transitions.append(np.sort(pos[inside]))
            image_tracks.append(c)
    mz, mx = (m, np.zeros_like(m)) if orientation == "out-of-plane" else (np.zeros_like(m), m)
    phase = _field_phase(mz * ms_a_per_m, mx * ms_a_per_m, fine, lift_m, thickness_m, moment, delta_m,
                         amplitude_m=amplitude_m)
    sub = phase[margin_px * oversample::oversample, margin_px * oversample::oversample][:rows, :cols]
    noisy = sub + rng.normal(scale=noise_deg, size=sub.shape)
    return MediaImage(noisy, pixel_m, lift_m, transitions, np.asarray(image_tracks),
                      {"clean_deg": sub, "bit_m": bit_m, "jitter_m": jitter_m, "pitch_m": pitch_m,
                       "width_m": width_m, "written_width_m": float(np.median(written)), "erase_m": erase_m,
                       "a_m": transition_a_m, "orientation": orientation})


def domain_image(*, rows=256, cols=256, pixel_m=10e-9, period_m=300e-9, orientation="out-of-plane", lift_m=20e-9,
                 thickness_m=20e-9, ms_a_per_m=4e5, wall_m=8e-9, noise_deg=0.02, seed=0, margin_px=32):
    """Random +-1 domains (band-limited Gaussian field thresholded, smoothed walls), magnetised along z or
    along +-x; cropped from a larger periodic map."""
    rng = np.random.default_rng(seed)
    n_r, n_c = rows + 2 * margin_px, cols + 2 * margin_px
    fr = np.fft.fftfreq(n_r, d=pixel_m)[:, None]
    fc = np.fft.fftfreq(n_c, d=pixel_m)[None, :]
    f = np.hypot(fr, fc)
    spec = np.exp(-0.5 * ((f - 1.0 / period_m) / (0.35 / period_m)) ** 2)
    g = np.fft.ifft2(np.fft.fft2(rng.normal(size=(n_r, n_c))) * spec).real
    gy, gx = np.gradient(g, pixel_m)
    m = np.tanh(g / np.maximum(np.hypot(gx, gy), 1e-30) / wall_m)
    mz, mx = (m, np.zeros_like(m)) if orientation == "out-of-plane" else (np.zeros_like(m), m)
    phase = _field_phase(mz * ms_a_per_m, mx * ms_a_per_m, pixel_m, lift_m, thickness_m, 1e-16, 30e-9)
    crop = phase[margin_px:margin_px + rows, margin_px:margin_px + cols]
    return MediaImage(crop + rng.normal(scale=noise_deg, size=crop.shape), pixel_m, lift_m, [], np.array([]),
                      {"orientation": orientation})
