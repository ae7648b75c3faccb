"""The free lever's phase offset from quadrature at the drive, read from the image means of a bias grid.

The drive is set on the resonance that a sweep fit found, and the fit's error puts it a few hertz off: the free
lever's phase is then ``offset`` from quadrature (``tan(offset) ~ -2 Q (f_drive - f0) / f0``, :mod:`.phase`), and
a phase read against it is ``arctan(tan(offset) - Q F'/k) - offset``. Inverted as if on resonance, every contrast is
scaled by how far its pixels' phase sits from zero: with a bias grid, the images far from V_cpd then show more (or
less) of the same magnetic contrast, and the image means stop being parabolas in the bias.

The means give the offset: inverted with the right one, the mean force gradient at every height is exactly
``a_h (V - V_cpd)^2 + c_h`` (Hudlet et al. 1998, Eur. Phys. J. B 2, 5). The offset is the one that minimises the
parabolas' chi-square (each mean recomputed from its pixels), plus a Gaussian prior of ``prior_tan_std`` = 0.03 on
``tan(offset)``, about 1.7 deg: a sweep fit places f0 within about 1.5 % of the line width f0/Q (common practice,
no source; the default simulated stage's fit is 1 % off). A grid whose phases are too small to tell then keeps the
offset near zero, where it matters little (the scale error is about ``2 tan(offset) tan(phase)``), and parabolas
that cannot fit the means anyway (a tip that switches the film between passes) cannot pull it to tens of degrees:
with a prior of 0.1 one such run read 17 deg.
"""

from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass

import numpy as np

from .image_means import _vertex_chi2, plus_minus
from .phase import SignalSpace

__all__ = ["DriveOffset", "fit_drive_offset", "with_offset_error", "drive_offset_sentence"]

_TAN_LIMIT = 0.3  # largest |tan(offset)| searched: 17 deg, a drive off by 15 % of the line width


@dataclass(frozen=True)
class DriveOffset:
    offset_deg: float        # the free lever's phase from quadrature at the drive
    offset_std_deg: float    # its standard error (from the curvature of the chi-square and prior)
    reduced_chi2_before: float  # of the parabolas with no offset
    reduced_chi2_after: float   # with the offset
    sensitivity_deg: np.ndarray | None = None  # (H, B) d offset / d image mean [deg per signal unit], linearised


def _tan_images(phase_deg, valid):
    """tan(phase) of every valid pixel, 0 elsewhere, and the number of valid pixels of each image."""
    ok = np.asarray(valid, bool)
    return np.where(ok, np.tan(np.radians(np.where(ok, phase_deg, 0.0))), 0.0), np.maximum(ok.sum(axis=(-2, -1)), 1)


def _means_at(x, counts, scale, t):
    """Each image's mean of -(k/Q)(tan(phase + offset) - tan(offset)) at tan(offset) = t: with x = tan(phase) that is
    -(k/Q)(1 + t^2) x / (1 - t x) (invalid pixels hold x = 0 and add nothing)."""
    return -scale * (1.0 + t * t) * np.sum(x / (1.0 - t * x), axis=(-2, -1)) / counts


def _objective(x, counts, scale, mean_std, volts, v_start):
    """chi-square of the parabolas (V_cpd profiled) at tan(offset) = t, as a function of t, and the V_cpd it last
    found."""
    from scipy.optimize import minimize_scalar

    w = 1.0 / np.asarray(mean_std, float) ** 2
    state = {"v0": v_start}

    def chi2_at(t):
        means = _means_at(x, counts, scale, t)
        res = minimize_scalar(lambda v: _vertex_chi2(v, volts, means, w)[0], method="brent",
                              bracket=(state["v0"] - 0.01, state["v0"] + 0.01))
        state["v0"] = float(res.x)
        return float(res.fun)

    return chi2_at, state


def _sensitivity(x, counts, scale, mean_std, volts, t, v0, prior):
    """d tan(offset) / d image mean (H, B) [per signal unit], of the fit linearised at its solution: with the
    residual r = means(t) - a_h (V - V0)^2 - c_h and the noise n added to the means, the Gauss-Newton step is
    -(A^T W A + L)^-1 A^T W n, A = dr/d(V0, a, c, t), L the prior's curvature on t."""
    w = 1.0 / np.asarray(mean_std, float) ** 2
    means = _means_at(x, counts, scale, t)
    step = 1e-6
    d_t = (_means_at(x, counts, scale, t + step) - _means_at(x, counts, scale, t - step)) / (2.0 * step)
    _, a, _ = _vertex_chi2(v0, volts, means, w)
    nh, nb = means.shape
    jac = np.zeros((nh, nb, 2 * nh + 2))
    jac[:, :, 0] = 2.0 * a[:, None] * (volts - v0)[None]
    idx = np.arange(nh)
    jac[idx, :, 1 + idx] = -((volts - v0) ** 2)[None]
    jac[idx, :, 1 + nh + idx] = -1.0
    jac[:, :, -1] = d_t
    aw = jac.reshape(nh * nb, -1) * w.reshape(-1, 1)
    normal = jac.reshape(nh * nb, -1).T @ aw
    normal[-1, -1] += 1.0 / prior**2
    return -np.linalg.solve(normal, aw.T)[-1].reshape(nh, nb)


def fit_drive_offset(phase_deg, valid, mean_std, *, bias_v, space: SignalSpace, cpd_start_v: float,
                     prior_tan_std: float = 0.03) -> DriveOffset:
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
    chi2_at, state = _objective(x, counts, scale, mean_std, volts, cpd_start_v)
    limit = min(_TAN_LIMIT, 0.5 / max(float(np.abs(x).max()), 1e-12))  # keeps 1 - t x above 1/2
    dof = max(x.shape[0] * x.shape[1] - (2 * x.shape[0] + 2), 1)

    def minimum(birge: float) -> tuple[float, float]:
        def total(t):
            return chi2_at(t) / birge + (t / prior_tan_std) ** 2

        # a coarse look first, so that the bounded search starts in the right valley
        grid = np.linspace(-limit, limit, 13)
        i = int(np.argmin([total(t) for t in grid]))
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
        t = float(minimize_scalar(total, bounds=(lo, hi), method="bounded", options={"xatol": 1e-7}).x)
        step = 1e-3
        return t, (total(t + step) - 2.0 * total(t) + total(t - step)) / step**2

    t, curvature = minimum(1.0)
    after = chi2_at(t) / dof
    # parabolas that do not fit the means (a tip that switches the film between passes, say) tell less: their
    # chi-square is scaled by its reduced value (Birge), so the prior keeps an offset they cannot support near 0
    birge = max(after, 1.0)
    if birge > 1.0:
        t, curvature = minimum(birge)
        after = chi2_at(t) / dof
    t_std = np.sqrt(2.0 / curvature) if curvature > 0 else prior_tan_std
    sensitivity = _sensitivity(x, counts, scale, np.asarray(mean_std, float) * np.sqrt(birge), volts, t,
                               state["v0"], prior_tan_std)
    to_deg = np.degrees(1.0) / (1.0 + t * t)
    return DriveOffset(float(np.degrees(np.arctan(t))), float(t_std * to_deg), chi2_at(0.0) / (dof + 1), after,
                       sensitivity * to_deg)


def with_offset_error(a, lo, hi, found: DriveOffset, space: SignalSpace):
    """The decomposition ``a`` (a :class:`.result.SeriesAnalysis` inverted with ``found``) with the offset's own error
    in its standard errors; ``lo`` and ``hi`` are the same decomposition at the offset less and plus its standard
    error.

    The offset is itself an estimate from the noisy means, so everything inverted with it scatters with it. The mean
    square of the changes from ``a`` to ``lo`` and to ``hi`` is that scatter's variance, taken numerically because
    the heights and the parts are coupled through the fit, and added. Half the change from ``lo`` to ``hi`` alone
    vanishes where a result is at its extremum in the offset: the magnetic rms has one where the inversion scales
    the contrast least, and on a grid on resonance whose offset was read 0.71 +- 0.55 deg it came out at z -4.8 (30
    such grids: 6.7 % of the z beyond 3); with both sides, none beyond 3 (their spread 0.53-0.69, since the offset's
    error is a posterior spread). It is not linear either: the contact potential's removal (:mod:`.lateral_cpd`)
    takes out part of a contrast that a wrong offset makes bias-dependent once that exceeds the noise (a synthetic
    crop's magnetic rms moved 1.0, 0.6 and 0.1 x 10^-3 deg over offsets 0-0.43-0.86-1.47 deg), so a one-sided
    change can miss most of it. The measured means, which the offset is read from, also carry the
    correlation of their own noise with it: ``2 (d mean / d offset) cov(noise, offset)``, the covariance from the
    fit's linearised sensitivity (``found.sensitivity_deg``). ``space``: k and Q, to turn the means' errors back
    into signal units."""
    sd = found.offset_std_deg

    def wider(name: str, std_name: str, sensitivity=None):
        at, below, above = (np.asarray(getattr(x, name)) for x in (a, lo, hi))
        change = 0.5 * (above - below)
        # the mean square of the changes to either side, (change^2 + bend^2 / 4): where a result is near its
        # extremum in the offset, the change from lo to hi vanishes while the offset's error still moves it
        bend = above - 2.0 * at + below
        var = np.asarray(getattr(a, std_name)) ** 2 + change**2 + 0.25 * bend**2
        if sensitivity is not None:  # d phase / d signal is -slope: an attractive gradient reads negative
            slope = space.slope(space.from_phase(getattr(a, name)))  # deg per signal unit, on resonance
            var = var - 2.0 * (change / sd) * sensitivity * np.asarray(getattr(a, std_name)) ** 2 / slope
        return np.sqrt(np.clip(var, 0.0, None))

    sentence, cpd_std_v = a.separability_sentence, a.cpd_std_v  # no V_cpd (beyond the biases' reach): none to widen
    if a.cpd_v is not None and lo.cpd_v is not None and hi.cpd_v is not None:
        cpd_std_v = float(wider("cpd_v", "cpd_std_v"))
        # the sentence's V_cpd rebuilt with the whole error the results now hold (noise, offset and model), as every
        # output states it; it was written before the offset's share was known
        whole = float(np.hypot(cpd_std_v, a.cpd_model_std_v or 0.0))
        sentence = re.sub(r"V_cpd = [^;]* mV;", lambda _: f"V_cpd = {plus_minus(1e3 * a.cpd_v, 1e3 * whole)} mV;",
                          sentence, count=1)
    return dataclasses.replace(
        a, separability_sentence=sentence,
        magnetic_rms_std_deg=wider("magnetic_rms_deg", "magnetic_rms_std_deg"),
        electrostatic_mean_std_deg=wider("electrostatic_mean_deg", "electrostatic_mean_std_deg"),
        short_range_mean_std_deg=wider("short_range_mean_deg", "short_range_mean_std_deg"),
        nonmagnetic_mean_std_deg=wider("nonmagnetic_mean_deg", "nonmagnetic_mean_std_deg", found.sensitivity_deg),
        mean_phase_std_deg=wider("mean_phase_deg", "mean_phase_std_deg", found.sensitivity_deg),
        cpd_std_v=cpd_std_v)


def drive_offset_sentence(found: DriveOffset, *, quality_factor: float, resonance_hz: float | None) -> str:
    """What the offset says of the drive, where it is beyond two standard errors; empty otherwise."""
    if abs(found.offset_deg) <= 2.0 * found.offset_std_deg:
        return ""
    t, t_sd = np.tan(np.radians(found.offset_deg)), np.radians(found.offset_std_deg)
    # f_drive - f0 = -f0 tan(offset) / (2 Q), to first order in the detuning
    if resonance_hz:
        off, sd = -resonance_hz * t / (2.0 * quality_factor), resonance_hz * t_sd / (2.0 * quality_factor)
        where = f"{plus_minus(abs(off), sd)} Hz {'below' if off < 0 else 'above'}"
    else:
        share = -t / 2.0
        side = "below" if share < 0 else "above"
        where = f"{plus_minus(100 * abs(share), 50 * t_sd)} % of the line width f0/Q {side}"
    sign = "+" if found.offset_deg >= 0 else "-"
    offset = plus_minus(abs(found.offset_deg), found.offset_std_deg)
    return (f" The free lever's phase at the drive is {sign}{offset} deg from quadrature (the drive {where} the "
            "resonance), read from the bias dependence of the image means; every "
            f"phase was inverted with it (parabolas' reduced chi-square {found.reduced_chi2_before:.3g} without it, "
            f"{found.reduced_chi2_after:.3g} with it). The errors stated hold the offset's own "
            "error.")


