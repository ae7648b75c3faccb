"""What one or two lift heights tell without the decomposition: :func:`analyse_imaging` (see the package)."""

from __future__ import annotations

import numpy as np

from ..lift_series import (NoiseVerdict, TipChange, detect_tip_change, gradient_from_phase_deg, noise_verdict,
                           phase_deg_from_gradient)
from ..lift_series.noise_floor import white_noise_std
from .errors import ImagingInputError
from .parabola import fit_bias_parabola
from .result import ImagingAnalysis, decomposition_needs

__all__ = ["analyse_imaging"]

_MAD_TO_STD = 1.482602218505602  # Gaussian consistency factor of the median absolute deviation


def _reference_noise(s4: np.ndarray, repeat: np.ndarray | None, tip: TipChange | None) -> tuple[float, str]:
    """Per-pixel noise of one pass [deg] and where it came from."""
    if repeat is not None and tip is not None and not tip.irreversible:
        return float(tip.noise_deg), "the repeat pass against the first pass"
    nh, nb = s4.shape[:2]
    if nb >= 2:
        # two biases at one height see the same magnetic contrast: their difference is the (smooth)
        # electrostatic difference plus the noise of two passes
        diff = s4[0, 1] - s4[0, 0]
        diff = np.where(np.isfinite(diff), diff, np.nanmedian(diff))
        return white_noise_std(diff) / np.sqrt(2.0), "the difference of two bias images at one height"
    top = s4[-1, 0]
    top = np.where(np.isfinite(top), top, np.nanmedian(top))
    return (white_noise_std(top), "the highest spatial frequencies of the top image (an upper bound where "
                                  "magnetic contrast reaches them)")


def _upper_bound(v: NoiseVerdict) -> NoiseVerdict:
    """The verdict when the only noise estimate is the image's own high spatial frequencies: an upper bound
    (fine magnetic contrast counts as noise there), so neither excess noise nor a suspect calibration follows."""
    limit = "" if v.thermal_phase_noise_deg is None else f" (thermal limit {v.thermal_phase_noise_deg:.3g} deg)"
    return NoiseVerdict(v.measured_phase_noise_deg, v.thermal_phase_noise_deg, v.thermal_gradient_n_per_m, v.ratio,
                        "upper_bound",
                        f"Phase noise at most {v.measured_phase_noise_deg:.3g} deg rms{limit}: without a repeat pass "
                        "or a bias grid the noise cannot be told from fine contrast, so this is the image's own "
                        "high-frequency content, an upper bound.")


def analyse_imaging(phase_deg, *, heights_m, bias_v=None, repeat_phase_deg=None,
                    spring_constant_n_per_m: float | None = None, quality_factor: float | None = None,
                    resonance_hz: float | None = None, amplitude_m: float | None = None,
                    bandwidth_hz: float | None = None, temperature_k: float = 298.15,
                    max_phase_deg: float = 45.0) -> ImagingAnalysis:
    """Analyse a series of any number of heights without the decomposition (meant for one or two).

    Parameters
    ----------
    phase_deg : array_like
        Second-pass phase [deg], (heights, lines, pixels) or (heights, biases, lines, pixels); NaN = missing.
    heights_m : array_like
        Lift heights [m].
    bias_v : array_like, optional
        Biases of a bias grid (at least 3) for a 4-D stack.
    repeat_phase_deg : ndarray (lines, pixels), optional
        The first height (first bias) repeated at each line's end.
    spring_constant_n_per_m, quality_factor : float, optional
        With both, the phase is turned into the force gradient before the bias parabola is fitted (exact;
        the electrostatic gradient, not the phase, is quadratic in V).
    resonance_hz, amplitude_m, bandwidth_hz, temperature_k : float, optional
        For the thermal phase-noise limit (Albrecht et al. 1991); ``amplitude_m`` is the peak amplitude.
        Without them the noise is reported without a verdict (nothing is assumed).
    max_phase_deg : float
        Pixels beyond this magnitude are left out (tip touching; rule of thumb, no source).
    """
    stack = np.asarray(phase_deg, float)
    h = np.atleast_1d(np.asarray(heights_m, float))
    if stack.ndim not in (3, 4):
        raise ImagingInputError(f"phase_deg must be (heights, lines, pixels) or (heights, biases, lines, pixels), "
                                f"got shape {stack.shape}")
    if h.ndim != 1 or h.size != stack.shape[0] or h.size < 1:
        raise ImagingInputError(f"{h.size} heights given but the stack has {stack.shape[0]}")
    grid = stack.ndim == 4
    volts = None
    if grid:
        if bias_v is None:
            raise ImagingInputError("a (heights, biases, lines, pixels) stack needs bias_v")
        volts = np.atleast_1d(np.asarray(bias_v, float))
        if volts.size != stack.shape[1]:
            raise ImagingInputError(f"{volts.size} biases given but the stack has {stack.shape[1]}")
    s4 = stack if grid else stack[:, None]
    nh, nb, n_lines, n_px = s4.shape
    bad = ~np.isfinite(s4)
    s4 = np.where(bad | (np.abs(np.where(bad, 0.0, s4)) > max_phase_deg), np.nan, s4)

    repeat = None if repeat_phase_deg is None else np.asarray(repeat_phase_deg, float)
    if repeat is not None and repeat.ndim == 3:
        repeat = repeat[0]
    tip = None
    if repeat is not None:
        first = s4[0, 0]
        # judged against an estimate that a changed sample cannot inflate, where the series has one
        ref = None if nb < 2 else _reference_noise(s4, None, None)[0]
        tip = detect_tip_change(first, repeat, noise_deg=ref)
    ref_noise, noise_source = _reference_noise(s4, repeat, tip)
    verdict_inputs = dict(spring_constant_n_per_m=spring_constant_n_per_m, resonance_hz=resonance_hz,
                          quality_factor=quality_factor, bandwidth_hz=bandwidth_hz, amplitude_m=amplitude_m)
    verdict = noise_verdict(ref_noise, temperature_k=temperature_k, **verdict_inputs)
    if noise_source.startswith("the highest spatial frequencies") and verdict.verdict != "thermal_limit":
        verdict = _upper_bound(verdict)

    counts = np.isfinite(s4).sum(axis=(-2, -1))
    mean = np.nanmean(s4, axis=(-2, -1))
    rms = np.nanstd(s4, axis=(-2, -1))
    contrast = np.sqrt(np.clip(rms**2 - ref_noise**2, 0.0, None))

    exact = spring_constant_n_per_m is not None and quality_factor is not None
    parabola = parabola_deg = grid_v = None
    if grid and np.unique(volts).size >= 3:
        if exact:
            k, qf = float(spring_constant_n_per_m), float(quality_factor)
            sig = gradient_from_phase_deg(s4, spring_constant_n_per_m=k, quality_factor=qf)
        else:
            sig = s4
        parabola = fit_bias_parabola(sig, bias_v=volts, attractive_sign=1.0 if exact else -1.0)
        grid_v = np.linspace(volts.min(), volts.max(), 101)
        model = parabola.model(grid_v)
        parabola_deg = (phase_deg_from_gradient(model, spring_constant_n_per_m=k, quality_factor=qf) if exact
                        else model)
        # the image mean's error, mapped to degrees through the local slope of the phase relation
        slope = 1.0
        if exact:
            slope = np.abs(np.degrees(qf / k) / (1.0 + (qf * parabola.mean / k) ** 2))
        mean_sd = parabola.mean_std * slope
        mean_sd_source = "the scatter of the line means not shared by the biases"
    elif repeat is not None and tip is not None and not tip.irreversible:
        d_lines = np.nanmean(repeat - s4[0, 0], axis=-1)
        d_lines = d_lines[np.isfinite(d_lines)]
        line_sd = _MAD_TO_STD * float(np.median(np.abs(d_lines - np.median(d_lines)))) / np.sqrt(2.0)
        mean_sd = np.full((nh, nb), line_sd / np.sqrt(max(d_lines.size, 1)))
        mean_sd_source = "the scatter of the line means of the repeat pass against the first pass"
    else:
        mean_sd = ref_noise / np.sqrt(np.maximum(counts, 1))
        mean_sd_source = "the pixel noise alone (no repeat pass, no bias grid: line-to-line offsets not included)"

    def shaped(a):
        a = np.asarray(a, float)
        return a if grid else a[:, 0]

    return ImagingAnalysis(
        heights_m=h, bias_v=volts, image_mean_deg=shaped(mean), image_mean_std_deg=shaped(mean_sd),
        image_rms_deg=shaped(rms), contrast_rms_deg=shaped(contrast), mean_std_source=mean_sd_source,
        reference_noise_deg=float(ref_noise), noise_source=noise_source, noise=verdict, tip_change=tip,
        parabola=parabola, parabola_deg=parabola_deg, parabola_bias_v=grid_v, nan_pixels=int(bad.sum()),
        signal_space="gradient" if exact else "phase", decomposition_sentence=decomposition_needs(nh))
