"""What one or two lift heights tell without the decomposition: :func:`analyse_imaging` (see the package)."""

from __future__ import annotations

import dataclasses

import numpy as np

from ..lift_series import NoiseVerdict, TipChange, detect_tip_change, noise_verdict, phase_deg_from_gradient
from ..lift_series.drive_offset import DriveOffset, drive_offset_sentence, fit_drive_offset
from ..lift_series.noise_floor import white_noise_std
from ..lift_series.phase import SignalSpace
from .errors import ImagingInputError
from .parabola import BiasParabola, fit_bias_parabola
from .result import ImagingAnalysis, decomposition_needs

__all__ = ["analyse_imaging"]

_MAD_TO_STD = 1.482602218505602  # Gaussian consistency factor of the median absolute deviation


def _reference_noise(s4: np.ndarray, repeat: np.ndarray | None, tip: TipChange | None) -> tuple[float, str]:
    """Per-pixel noise of one pass [deg] and where it came from."""
    if repeat is not None and tip is not None and not tip.irreversible:
        return float(tip.noise_deg), "the repeat pass against the first pass"
    nh, nb = s4.shape[:2]
    if nb >= 2:
        # two biases at one height see the same magnetic gradient: the difference of -tan(phase) = Q F'/k is the
        # (smooth) electrostatic difference plus the noise of two passes. In the phase itself the contrast does not
        # cancel (scaled by cos^2 of the phase it sits on): at -8.7 and -2.4 deg on a 8.6 deg rms pattern the noise
        # read 0.044 deg for 0.030. Each pass's noise reaches tan(phase) times (1 + tan^2), taken back here
        x = np.tan(np.radians(s4[0, :2]))
        diff = x[1] - x[0]
        diff = np.where(np.isfinite(diff), diff, np.nanmedian(diff))
        gain = np.sqrt(sum(float(np.nanmean((1.0 + xb**2) ** 2)) for xb in x))
        return np.degrees(white_noise_std(diff) / gain), "the difference of two bias images at one height"
    top = s4[-1, 0]
    top = np.where(np.isfinite(top), top, np.nanmedian(top))
    return (white_noise_std(top), "the highest spatial frequencies of the top image (an upper bound where "
                                  "magnetic contrast reaches them)")


def _upper_bound(v: NoiseVerdict) -> NoiseVerdict:
    """The verdict when the only noise estimate is the image's own high spatial frequencies: an upper bound
    (fine magnetic contrast counts as noise there), so neither excess noise nor a suspect calibration follows."""
    limit = "" if v.thermal_phase_noise_deg is None else f" (thermal limit {v.thermal_phase_noise_deg:.3g}°)"
    return NoiseVerdict(v.measured_phase_noise_deg, v.thermal_phase_noise_deg, v.thermal_gradient_n_per_m, v.ratio,
                        "upper_bound",
                        f"Phase noise at most {v.measured_phase_noise_deg:.3g}° rms{limit}: without a repeat pass "
                        "or a bias grid the noise cannot be told from fine contrast, so this is the image's own "
                        "high-frequency content, an upper bound.")


def _validated(phase_deg, heights_m, bias_v, k, qf) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """The stack as (heights, biases, lines, pixels), the heights and the biases (None without a grid), checked."""
    stack = np.asarray(phase_deg, float)
    h = np.atleast_1d(np.asarray(heights_m, float))
    if stack.ndim not in (3, 4):
        raise ImagingInputError(f"phase_deg must be (heights, lines, pixels) or (heights, biases, lines, pixels), "
                                f"got shape {stack.shape}")
    if h.ndim != 1 or h.size != stack.shape[0] or h.size < 1:
        raise ImagingInputError(f"{h.size} heights given but the stack has {stack.shape[0]}")
    if not np.all(np.isfinite(h) & (h > 0)):
        listed = ", ".join(f"{x:.4g}" for x in h * 1e9)
        raise ImagingInputError(f"lift heights must be finite and above 0 nm, got {listed} nm")
    for name, value, unit in (("spring constant k", k, " N/m"), ("quality factor Q", qf, "")):
        if value is not None and not (np.isfinite(value) and value > 0):
            raise ImagingInputError(f"the {name} must be finite and above 0, got {value}{unit}")
    if stack.ndim == 3:
        return stack[:, None], h, None
    if bias_v is None:
        raise ImagingInputError("a (heights, biases, lines, pixels) stack needs bias_v")
    volts = np.atleast_1d(np.asarray(bias_v, float))
    if volts.size != stack.shape[1]:
        raise ImagingInputError(f"{volts.size} biases given but the stack has {stack.shape[1]}")
    if not np.all(np.isfinite(volts)):
        raise ImagingInputError(f"the tip biases must be finite numbers, got {volts.tolist()} V")
    return stack, h, volts


def _bias_parabola(s4: np.ndarray, volts: np.ndarray, k: float, qf: float, *, resonance_hz: float | None
                   ) -> tuple[BiasParabola, DriveOffset | None]:
    """V_cpd from the image means of a bias grid, in the signal ``-(k/Q) tan(phase)`` (the force gradient; with
    k = Q = 1 the gradient in units of k/Q, whose vertex is the same), the drive's phase offset read from the
    same means first (:mod:`..lift_series.drive_offset`) and every phase inverted with it. Read against a free
    lever a little off quadrature, the phase is no longer odd in F' and the means stop being parabolas; fitted as
    if on resonance, V_cpd was 215 uV off on a nearly noiseless synthetic grid 1.07 deg from quadrature (two
    heights, -1 to 2 V), and over noisy repeats its z-scores averaged -2.3. The offset's own
    error goes into V_cpd's: half the change of the vertex between the offset less and plus its standard error,
    in quadrature (as the decomposition does)."""

    def fit(offset_deg: float, extra_std_v: float = 0.0, source: str = "") -> BiasParabola:
        signal = SignalSpace(k, qf, offset_deg).from_phase(s4)
        return fit_bias_parabola(signal, bias_v=volts, extra_vertex_std_v=extra_std_v, extra_source=source)

    first = fit(0.0)
    if first.cpd_v is None:  # means that do not vary with the bias tell no offset, and none changes them
        return first, None
    valid = np.broadcast_to(np.isfinite(s4).all(axis=1, keepdims=True), s4.shape)
    found = fit_drive_offset(s4, valid, first.mean_std, bias_v=volts, space=SignalSpace(k, qf),
                             cpd_start_v=first.vertex_v)
    lo, hi = (fit(found.offset_deg + side * found.offset_std_deg) for side in (-1.0, 1.0))
    change = 0.5 * abs(hi.vertex_v - lo.vertex_v)
    p = fit(found.offset_deg, change, "the drive's phase offset")
    note = drive_offset_sentence(found, quality_factor=qf, resonance_hz=resonance_hz)
    return dataclasses.replace(p, sentence=p.sentence + note), found


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
        the electrostatic gradient, not the phase, is quadratic in V); without them into ``-tan(phase)``, the
        gradient in units of k/Q, which has the same vertex.
    resonance_hz, amplitude_m, bandwidth_hz, temperature_k : float, optional
        For the thermal phase-noise limit (Albrecht et al. 1991); ``amplitude_m`` is the peak amplitude.
        Without them the noise is reported without a verdict (nothing is assumed).
    max_phase_deg : float
        Pixels beyond this magnitude are left out (tip touching; rule of thumb, no source).
    """
    s4, h, volts = _validated(phase_deg, heights_m, bias_v, spring_constant_n_per_m, quality_factor)
    grid = volts is not None
    nh, nb, n_lines, n_px = s4.shape
    bad = ~np.isfinite(s4)
    s4 = np.where(bad | (np.abs(np.where(bad, 0.0, s4)) > max_phase_deg), np.nan, s4)
    empty = np.argwhere(~np.isfinite(s4).any(axis=(-2, -1)))
    if empty.size:
        i, j = empty[0]
        where = f"{h[i] * 1e9:.4g} nm" + ("" if volts is None else f", {volts[j]:+.4g} V")
        raise ImagingInputError(f"the image at {where} has no pixel with data within ±{max_phase_deg:.4g}° "
                                "(beyond it the tip is taken to touch): leave that image out")

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
    parabola = parabola_deg = grid_v = offset = None
    if grid and np.unique(volts).size >= 3:
        # without k and Q, -tan(phase) = Q F'/k: the force gradient in units of k/Q, with the same vertex
        k, qf = (float(spring_constant_n_per_m), float(quality_factor)) if exact else (1.0, 1.0)
        parabola, offset = _bias_parabola(s4, volts, k, qf, resonance_hz=resonance_hz if exact else None)
        grid_v = np.linspace(volts.min(), volts.max(), 101)
        # the fitted parabola as the phase it gives when read as the images were (with the drive's offset)
        offset_deg = 0.0 if offset is None else offset.offset_deg
        parabola_deg = phase_deg_from_gradient(parabola.model(grid_v), spring_constant_n_per_m=k, quality_factor=qf,
                                               offset_deg=offset_deg)
        # the image mean's error, mapped to degrees through the local slope of the phase relation as read
        mean_sd = parabola.mean_std * SignalSpace(k, qf, offset_deg).read_slope(parabola.mean)
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
        signal_space="gradient" if exact else "tan_phase", decomposition_sentence=decomposition_needs(nh),
        drive_phase_offset_deg=None if offset is None else offset.offset_deg,
        drive_phase_offset_std_deg=None if offset is None else offset.offset_std_deg)
