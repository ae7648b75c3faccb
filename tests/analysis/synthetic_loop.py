"""Synthetic field series of a dot array, built from the published physics independently of the analysis code.

* each dot a perpendicular single-domain element with its own switching field h_i ~ N(Hc, sigma^2); on a
  descending branch from positive saturation it points -z once H <= -h_i, on an ascending branch from negative
  saturation +z once H >= h_i (Stoner-Wohlfarth switching along the easy axis, textbook; from memory);
* the stray field of the film per Fourier component, H_z(k, z) = 1/2 exp(-k z) (1 - exp(-k t)) M_z(k)
  (Hug et al. 1998, J. Appl. Phys. 83, 5609; REFERENCES-style thin-film charge formula, from memory);
* a point-probe tip (Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53): dipole m and monopole q a distance delta
  behind the apex, F'(k) = mu0 (m k^2 - q k) exp(-k delta) H_z(k, z), z the apex height (the lift);
* the tip's coating reverses past its own coercive field (all contrast inverts);
* phase -arctan(Q F'/k_c) in degrees, an image-mean offset per step, white noise, drift by Fourier shift of
  the whole field of view before the window is cut out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

MU0 = 1.25663706127e-6


@dataclass(frozen=True)
class LoopStack:
    phase_deg: np.ndarray  # (steps, rows, cols)
    repeat_phase_deg: np.ndarray
    field_a_per_m: np.ndarray
    topography_m: np.ndarray  # (rows, cols) of the first step
    topography_steps_m: np.ndarray  # (steps, rows, cols)
    centres_px: np.ndarray  # (dots, 2) [row, col] in the first step's window, every dot near the window
    switching_a_per_m: np.ndarray  # (dots,) their true switching fields
    states: np.ndarray  # (steps, dots) their true states
    tip: np.ndarray  # (steps,) +1 / -1
    drift_px: np.ndarray
    pixel_m: float


def loop_fields(h_max: float, step: float) -> np.ndarray:
    """+h_max down to -h_max and back up, ``step`` apart [A/m]."""
    down = np.arange(h_max, -h_max - 0.5 * step, -step)
    return np.concatenate([down, down[-2::-1]])


def true_states(fields: np.ndarray, h_sw: np.ndarray, start: float = 1.0) -> np.ndarray:
    """States of independent elements along an arbitrary field sequence (hysteresis of each element), from the
    states ``start`` (one for all, or one per element)."""
    s = np.broadcast_to(np.asarray(start, dtype=float), h_sw.shape).copy()
    out = []
    for h in fields:
        s = np.where(h <= -h_sw, -1.0, np.where(h >= h_sw, 1.0, s))
        out.append(s.copy())
    return np.array(out)


def make_loop_stack(*, seed: int = 0, fields: np.ndarray | None = None, hc: float = 300e3, sigma: float = 40e3,
                    tip_coercive: float = 200e3, noise_deg: float = 0.03, drift_step_px: float = 0.3,
                    rows: int = 96, cols: int = 96, pixel_m: float = 20e-9, period_m: float = 500e-9,
                    diameter_m: float = 250e-9, ms: float = 1e6, thickness_m: float = 15e-9, lift_m: float = 40e-9,
                    moment: float = 1e-16, monopole: float = 0.0, delta_m: float = 120e-9, q_factor: float = 240.0,
                    k_lever: float = 4.0, tip_switch: tuple[int, int, int] | None = None,
                    switching_a_per_m: np.ndarray | None = None, virgin: bool = False) -> LoopStack:
    """A field series of a square dot array seen through a ``rows`` x ``cols`` window.

    ``tip_switch = (dot, step, row)``: the tip reverses that dot (an index into ``centres_px``) while line
    ``row`` of step ``step`` is scanned, in that line's lift pass: the line itself still shows the old state,
    its repeat pass and every later line the new one. Pick a dot that the field reverses at the next step.
    ``switching_a_per_m`` replaces the random switching fields (one per dot of the whole field of view).
    ``virgin``: the dots start in the as-grown state, up or down at random, instead of all up.
    """
    rng = np.random.default_rng(seed)
    fields = loop_fields(450e3, 25e3) if fields is None else np.asarray(fields, float)
    big = max(rows, cols) + 64  # the dots around the window matter too: 32 px (640 nm) of them on every side
    x = (np.arange(big) - big / 2 + 0.5) * pixel_m
    cell = np.round(x / period_m).astype(int)
    sub = (np.arange(4) + 0.5) / 4 - 0.5  # 4 x 4 supersampling of each pixel for the dot edges
    dx = x[:, None] + sub[None, :] * pixel_m
    dx = dx - np.round(dx / period_m) * period_m
    coverage = ((dx[:, None, :, None] ** 2 + dx[None, :, None, :] ** 2) <= (diameter_m / 2) ** 2).mean(axis=(2, 3))
    span = cell.max() - cell.min() + 1
    ids = (cell[:, None] - cell.min()) * span + (cell[None, :] - cell.min())
    dots = span * span
    h_sw = np.abs(rng.normal(hc, sigma, dots)) if switching_a_per_m is None else np.asarray(switching_a_per_m)
    drift = np.vstack([[0.0, 0.0], np.cumsum(rng.normal(0, drift_step_px, (fields.size - 1, 2)), axis=0)])
    k_y = 2 * np.pi * np.fft.fftfreq(big, pixel_m)[:, None]
    k_x = 2 * np.pi * np.fft.rfftfreq(big, pixel_m)[None, :]
    k = np.hypot(k_x, k_y)
    ttf = MU0 * (moment * k**2 - monopole * k) * np.exp(-k * delta_m)
    decay = 0.5 * np.exp(-k * lift_m) * (1 - np.exp(-k * thickness_m))
    r0, c0 = (big - rows) // 2, (big - cols) // 2
    # every dot near the window, by its centre in window pixels
    cy, cx = np.divmod(np.arange(dots), span)
    centre = np.stack([(cy + cell.min()) * period_m, (cx + cell.min()) * period_m], axis=1) / pixel_m \
        + big / 2 - 0.5 - np.array([r0, c0])
    near = np.all((centre > -diameter_m / pixel_m) & (centre < np.array([rows, cols]) + diameter_m / pixel_m), axis=1)
    start = np.random.default_rng(seed + 1000).choice([-1.0, 1.0], dots) if virgin else 1.0
    states = true_states(fields, h_sw, start)
    tip, t = [], 1.0
    for h in fields:
        t = -1.0 if (t > 0 and h < -tip_coercive) else (1.0 if (t < 0 and h > tip_coercive) else t)
        tip.append(t)
    tip = np.array(tip)
    topo_big = 15e-9 * coverage + 0.3e-9 * rng.standard_normal((big, big))

    def window(image, d):
        spec = np.fft.rfft2(image) * np.exp(-1j * (k_y * d[0] + k_x * d[1]) * pixel_m)
        return np.fft.irfft2(spec, s=image.shape)[r0:r0 + rows, c0:c0 + cols]

    def phase_image(s_dots, tip_sign, d):
        mz = ms * coverage * s_dots[ids]
        fprime = np.fft.irfft2(tip_sign * ttf * decay * np.fft.rfft2(mz), s=mz.shape)
        return window(-np.degrees(np.arctan(q_factor * fprime / k_lever)), d)

    phase, repeat, topo = [], [], []
    near_ids = np.flatnonzero(near)
    for i in range(fields.size):
        offset = -0.4 + 0.05 * rng.standard_normal()  # electrostatic and short-range: the same over the image
        img = phase_image(states[i], tip[i], drift[i])
        rep = img.copy()
        if tip_switch is not None and i == tip_switch[1]:
            dot, row = near_ids[tip_switch[0]], tip_switch[2]
            after = states[i].copy()
            after[dot] = -after[dot]
            later = phase_image(after, tip[i], drift[i])
            img[row + 1:] = later[row + 1:]
            rep[row:] = later[row:]
            states[i, dot] = after[dot]  # the state the image leaves it in
        phase.append(img + offset + noise_deg * rng.standard_normal((rows, cols)))
        repeat.append(rep + offset + noise_deg * rng.standard_normal((rows, cols)))
        topo.append(window(topo_big, drift[i]))
    return LoopStack(phase_deg=np.array(phase), repeat_phase_deg=np.array(repeat), field_a_per_m=fields,
                     topography_m=topo[0], topography_steps_m=np.array(topo), centres_px=centre[near],
                     switching_a_per_m=h_sw[near], states=states[:, near], tip=tip, drift_px=drift, pixel_m=pixel_m)


def match(found_centres_px: np.ndarray, true_centres_px: np.ndarray, tolerance_px: float = 4.0) -> np.ndarray:
    """For each found element the index of the true dot whose centre is nearest (-1 if none within tolerance)."""
    d = np.hypot(*(found_centres_px[:, None, :] - true_centres_px[None, :, :]).transpose(2, 0, 1))
    best = np.argmin(d, axis=1)
    return np.where(d[np.arange(best.size), best] <= tolerance_px, best, -1)
