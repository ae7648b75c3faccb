"""The free lever's phase offset from quadrature at the drive, read from the image means of a bias grid.

The drive is set on the resonance that a sweep fit found, and the fit's error puts it a few hertz off: the free
lever's phase is then ``offset`` from quadrature (``tan(offset) ~ -2 Q (f_drive - f0) / f0``, :mod:`.phase`), and
a phase read against it is ``arctan(tan(offset) - Q F'/k) - offset``. Inverted as if on resonance, every contrast is
scaled by how far its pixels' phase sits from zero: with a bias grid, the images far from V_cpd then show more (or
less) of the same magnetic contrast, and the image means stop being parabolas in the bias.

The means give the offset: inverted with the right one, the mean force gradient at every height is exactly
``a_h (V - V_cpd)^2 + c_h`` (Hudlet et al. 1998, Eur. Phys. J. B 2, 5). The offset is the one that minimises the
parabolas' chi-square (each mean recomputed from its pixels), plus a Gaussian prior of ``prior_tan_std`` on
``tan(offset)``: a sweep fit places f0 within a few per cent of the line width f0/Q (common practice, no source),
so a grid whose phases are too small to tell keeps the offset near zero, where it then matters little (the
scale error is about ``2 tan(offset) tan(phase)``).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from .image_means import _vertex_chi2, fit_mean_bias_grid
from .lateral_cpd import add_lateral_cpd, lateral_contrast
from .mean_parts import split_bias_grid
from .phase import SignalSpace
from .signals import series_signals

__all__ = ["DriveOffset", "fit_drive_offset", "mean_parts_at", "with_offset_error",
           "contrast_scale_error", "drive_offset_sentence"]

_TAN_LIMIT = 0.3  # largest |tan(offset)| searched: 17 deg, a drive off by 15 % of the line width


@dataclass(frozen=True)
class DriveOffset:
    offset_deg: float        # the free lever's phase from quadrature at the drive
    offset_std_deg: float    # its standard error (from the curvature of the chi-square and prior)
    reduced_chi2_before: float  # of the parabolas with no offset
    reduced_chi2_after: float   # with the offset


def _tan_images(phase_deg, valid):
    """tan(phase) of every valid pixel, 0 elsewhere, and the number of valid pixels of each image."""
    ok = np.asarray(valid, bool)
    return np.where(ok, np.tan(np.radians(np.where(ok, phase_deg, 0.0))), 0.0), np.maximum(ok.sum(axis=(-2, -1)), 1)


def _means_at(x, counts, scale, t):
    """Each image's mean of -(k/Q)(tan(phase + offset) - tan(offset)) at tan(offset) = t: with x = tan(phase) that is
    -(k/Q)(1 + t^2) x / (1 - t x) (invalid pixels hold x = 0 and add nothing)."""
    return -scale * (1.0 + t * t) * np.sum(x / (1.0 - t * x), axis=(-2, -1)) / counts


def _objective(x, counts, scale, mean_std, volts, v_start, prior):
    """chi-square of the parabolas (V_cpd profiled) at tan(offset) = t, plus the prior, as a function of t."""
    from scipy.optimize import minimize_scalar

    w = 1.0 / np.asarray(mean_std, float) ** 2
    state = {"v0": v_start}

    def chi2_at(t):
        means = _means_at(x, counts, scale, t)
        res = minimize_scalar(lambda v: _vertex_chi2(v, volts, means, w)[0], method="brent",
                              bracket=(state["v0"] - 0.01, state["v0"] + 0.01))
        state["v0"] = float(res.x)
        return float(res.fun)

    return (lambda t: chi2_at(t) + (t / prior) ** 2), chi2_at


def fit_drive_offset(phase_deg, valid, mean_std, *, bias_v, space: SignalSpace, cpd_start_v: float,
                     prior_tan_std: float = 0.1) -> DriveOffset:
    """The free lever's phase offset at the drive from the image means of a bias grid (see the module).

    Parameters
    ----------
    phase_deg : ndarray (H, B, rows, cols)
        The second-pass phases, read against the free lever's [deg].
    valid : ndarray of bool, same shape
        Pixels that enter the means, the same at every bias of a height (:func:`.signals.mean_pixels`): a pixel
        left out at the far biases alone bends the parabolas (on a synthetic wide grid, 0.06 % of the pixels at
        one bias moved the offset by 0.1-0.2 deg, six standard errors).
    mean_std : ndarray (H, B)
        Standard error of each image's mean force gradient [N/m].
    bias_v : array_like (B,)
    space : SignalSpace
        With k and Q (its own offset is not used).
    cpd_start_v : float
        V_cpd of the parabolas fitted with no offset, where the search starts.
    prior_tan_std : float
        Standard deviation of the prior on tan(offset).
    """
    from scipy.optimize import minimize_scalar

    x, counts = _tan_images(phase_deg, valid)
    volts = np.asarray(bias_v, float)
    scale = float(space.spring_constant_n_per_m) / float(space.quality_factor)
    total, chi2_at = _objective(x, counts, scale, mean_std, volts, cpd_start_v, prior_tan_std)
    # a coarse look first, so that the bounded search starts in the right valley
    limit = min(_TAN_LIMIT, 0.5 / max(float(np.abs(x).max()), 1e-12))  # keeps 1 - t x above 1/2
    grid = np.linspace(-limit, limit, 13)
    i = int(np.argmin([total(t) for t in grid]))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    t = float(minimize_scalar(total, bounds=(lo, hi), method="bounded", options={"xatol": 1e-7}).x)
    step = 1e-3
    curvature = (total(t + step) - 2.0 * total(t) + total(t - step)) / step**2
    dof = max(x.shape[0] * x.shape[1] - (2 * x.shape[0] + 2), 1)
    after = chi2_at(t) / dof
    t_std = np.sqrt(2.0 / curvature) * np.sqrt(max(after, 1.0)) if curvature > 0 else prior_tan_std
    return DriveOffset(float(np.degrees(np.arctan(t))), float(np.degrees(t_std / (1.0 + t * t))),
                       chi2_at(0.0) / (dof + 1), after)


def mean_parts_at(phase_deg, valid, space: SignalSpace, *, bias_v, magnetic_mean_cov, signals_options: dict):
    """The bias grid's image-mean parts with the phases inverted in ``space``: the parabolas, the varying contact
    potential's term, the split, as :func:`~.decomposition.analyse_series` takes them (its magnetic window mean
    given as ``magnetic_mean_cov``)."""
    sg = series_signals(phase_deg, valid, space, **signals_options)
    fit = fit_mean_bias_grid(sg.means, sg.mean_sd, bias_v=bias_v)
    lateral = lateral_contrast(sg.src, sg.image_var, fit, bias_v=bias_v)
    parts = split_bias_grid(sg.means, sg.mean_sd, magnetic_mean_cov, bias_v=bias_v, fit=fit)
    return add_lateral_cpd(parts, lateral, sg.okf, bias_v=bias_v, noise_dof=sg.dof)


def with_offset_error(parts, found: DriveOffset, parts_at):
    """:class:`.mean_parts.MeanParts` with the offset's own error in the model uncertainties: half the change of
    the image means, of the parts and of V_cpd between the offset one standard error below and above it
    (``parts_at(offset_deg)`` gives the parts at an offset)."""
    lo, hi = (parts_at(found.offset_deg + side * found.offset_std_deg) for side in (-1.0, 1.0))

    def half(name):
        return 0.5 * np.abs(np.asarray(getattr(hi, name), float) - np.asarray(getattr(lo, name), float))

    return dataclasses.replace(
        parts, total_model_std=np.hypot(parts.total_model_std, half("total")),
        electrostatic_model_std=np.hypot(parts.electrostatic_model_std, half("electrostatic")),
        short_range_model_std=np.hypot(parts.short_range_model_std, half("short_range")),
        cpd_model_std_v=float(np.hypot(parts.cpd_model_std_v or 0.0, half("cpd_v"))))


def contrast_scale_error(phase_deg, valid, found: DriveOffset) -> np.ndarray:
    """(H,) the relative error of each height's bias-averaged contrast that the offset's own error makes.

    Inverted with an offset ``d`` off the true one, a contrast on a pixel of phase ``phase`` is scaled by
    ``cos^2(phase + offset + d) / cos^2(phase + offset) ~ 1 - 2 tan(phase) d`` (first order): each image by its
    mean phase, the biases of a height averaged."""
    ok = np.asarray(valid, bool)
    mean_phase = np.where(ok, phase_deg, 0.0).sum(axis=(-2, -1)) / np.maximum(ok.sum(axis=(-2, -1)), 1)
    return 2.0 * np.abs(np.tan(np.radians(mean_phase)).mean(axis=1)) * np.radians(found.offset_std_deg)


def drive_offset_sentence(found: DriveOffset, *, quality_factor: float, resonance_hz: float | None) -> str:
    """What the offset says of the drive, where it is beyond two standard errors; empty otherwise."""
    if abs(found.offset_deg) <= 2.0 * found.offset_std_deg:
        return ""
    t, t_sd = np.tan(np.radians(found.offset_deg)), np.radians(found.offset_std_deg)
    # f_drive - f0 = -f0 tan(offset) / (2 Q), to first order in the detuning
    if resonance_hz:
        off, sd = -resonance_hz * t / (2.0 * quality_factor), resonance_hz * t_sd / (2.0 * quality_factor)
        where = f"{_pm(abs(off), sd)} Hz {'below' if off < 0 else 'above'}"
    else:
        share = -t / 2.0
        where = f"{_pm(100 * abs(share), 50 * t_sd)} % of the line width f0/Q {'below' if share < 0 else 'above'}"
    sign = "+" if found.offset_deg >= 0 else "-"
    offset = _pm(abs(found.offset_deg), found.offset_std_deg)
    return (f" The free lever's phase at the drive is {sign}{offset} deg from quadrature (the drive {where} the "
            "resonance), read from the bias dependence of the image means; every "
            f"phase was inverted with it (parabolas' reduced chi-square {found.reduced_chi2_before:.3g} without it, "
            f"{found.reduced_chi2_after:.3g} with it).")


def _pm(value: float, std: float) -> str:
    """``value ± std`` with the standard error to two significant digits and the value to the same place."""
    places = max(0, 1 - int(np.floor(np.log10(std)))) if std > 0 else 3
    return f"{value:.{places}f} ± {std:.{places}f}"
