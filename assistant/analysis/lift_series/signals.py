"""A series in the unit the decomposition fits in: each image's mean, the mean-free images and their noise.

:func:`series_signals` is the first step of :func:`~.decomposition.analyse_series`, taken again when the drive's
phase offset (:mod:`.drive_offset`) changes how the phase is inverted.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .frequencies import alias_axes_for
from .image_noise import band_noise_variance, fill_missing
from .phase import SignalSpace
from .tip_change import detect_tip_change

__all__ = ["SeriesSignals", "series_signals", "mean_pixels"]


@dataclass(frozen=True)
class SeriesSignals:
    """The series in signal units (``H * B`` images, height-major)."""

    means: np.ndarray        # (H, B) each image's mean over the pixels valid at every bias of its height
    n_ok: np.ndarray         # (H, B) how many pixels entered it
    mean_sd: np.ndarray      # (H, B) its standard error from the noise
    flat: np.ndarray         # (H * B, rows, cols) images less their mean over their own valid pixels, 0 elsewhere
    src: np.ndarray          # the same with holes filled smoothly
    okf: np.ndarray          # (H * B, rows, cols) valid pixels
    image_var: np.ndarray    # (H * B,) noise variance of one pixel of each image
    dof: float               # degrees of freedom of that noise estimate
    alias_axes: tuple        # axes with alias fields


def mean_pixels(ok) -> np.ndarray:
    """(H, B, rows, cols) the pixels each image's mean is taken over: those valid at every bias of its height."""
    return np.broadcast_to(np.asarray(ok, bool).all(axis=1, keepdims=True), np.shape(ok))


def series_signals(s4, ok, space: SignalSpace, *, heights_m, pixel_m, edge: str, repeat_phase_deg=None):
    """The phases ``s4`` (H, B, rows, cols) [deg] in the units of ``space``; ``ok`` the pixels that count."""
    nh, nb, rows, cols = s4.shape
    h = np.asarray(heights_m, float)
    sig = space.from_phase(s4)
    own = np.where(ok, sig, 0.0).sum(axis=(-2, -1)) / ok.sum(axis=(-2, -1))
    centred = np.where(ok, sig - own[..., None, None], 0.0)
    # the means of one height's biases over the same pixels, those valid at every bias: a pixel left out at one bias
    # alone (beyond max_phase_deg far from V_cpd) would bend the parabolas of the means (drive_offset)
    common = mean_pixels(ok)
    n_ok = common.sum(axis=(-2, -1))
    means = np.where(common, sig, 0.0).sum(axis=(-2, -1)) / n_ok
    flat = centred.reshape(nh * nb, rows, cols)
    okf = ok.reshape(nh * nb, rows, cols)
    # the noise of every image from its highest frequencies, independent of any fit (image_noise); holes are
    # filled smoothly first, and a periodic scan needs no window (its edges meet smoothly)
    src = flat if okf.all() else fill_missing(flat, okf)
    alias_axes = alias_axes_for("auto", pixel_m, h[0])
    image_var, dof = band_noise_variance(src, aliased_axes=alias_axes, valid_fraction=okf.mean(axis=(1, 2)),
                                         taper=0.0 if edge == "periodic" else 1.0)
    # the phase noise of one series is alike at every height (the same detector and oscillation); the highest
    # height has the least magnetic contrast left in the band, where the lower ones keep some when the pixels are
    # not much finer than the lift (a simulated 32 x 128 run with 31 nm pixels read 5 x the noise at 10 nm). In
    # the signal each image's noise is that phase noise times the slope of the inversion at its pixels (a mean
    # phase of -21 deg makes it 16 % larger)
    gain = np.array([np.mean(1.0 / space.read_slope(sig_i[ok_i]) ** 2)
                     for sig_i, ok_i in zip(sig.reshape(nh * nb, rows, cols), okf)])
    phase_var = image_var.reshape(nh, nb)[-1] / gain.reshape(nh, nb)[-1]  # per bias, from the top height
    if len(alias_axes) == 2 and repeat_phase_deg is not None:
        # with both axes aliased no band is free of signal: the first pass minus its repeat is (a robust
        # median-based estimate, about 37 % efficient); identical passes (noise-free data) keep the band's
        rep = np.asarray(repeat_phase_deg, float)
        rep_var = detect_tip_change(s4[0, 0], rep[0] if rep.ndim == 3 else rep).noise_deg ** 2
        if rep_var > 0:
            phase_var, dof = np.full(nb, rep_var), 0.37 * rows * cols
    image_var = np.tile(phase_var, nh) * gain
    image_var = np.maximum(image_var, 1e-24 * float(np.mean(centred**2)) + 1e-300)  # noise-free data: finite weights
    mean_sd = np.sqrt(image_var.reshape(nh, nb)) / np.sqrt(n_ok)
    return SeriesSignals(means, n_ok, mean_sd, flat, src, okf, image_var, dof, tuple(alias_axes))
