"""What one or two lift heights tell without the lift-series decomposition: :func:`analyse_imaging`.

The decomposition into magnetic, electrostatic and short-range parts needs the decay of the contrast over at
least three heights. One or two heights still give:

* per-image statistics: the image mean with its standard error, the rms contrast about the mean with the
  noise taken out in quadrature;
* the phase noise against the thermal limit (Albrecht et al. 1991), from the most direct noise estimate the
  series offers (the repeat pass, else the difference of two bias images at one height, else the high spatial
  frequencies of the top image, which is an upper bound where magnetic contrast reaches them);
* the repeat-pass check for a tip that changed the sample;
* with a bias grid (at least three biases) the contact potential difference V_cpd: the electrostatic gradient
  is ``1/2 C''(z) (V - V_cpd)^2`` (Hudlet, Saint Jean, Guthmann & Berger 1998, Eur. Phys. J. B 2, 5; the
  capacitance of a sphere over a plane after Smythe, Static and Dynamic Electricity), so the image mean is a
  parabola in V whose vertex is V_cpd at every height. No height series is needed.

V_cpd and its standard error. The parabola is fitted to the image means (one common vertex over the heights,
its own curvature and offset per height). Everything that is the same for all biases in one scan line (the
magnetic contrast along that line, a line offset of the first pass) cancels from the vertex. The scatter that
does not cancel is measured, not assumed: the line means ``y[h, b, l]`` less their mean over the biases and
less the image-mean profile leave the interaction residual of a two-way layout (lines x biases, one value per
cell), whose variance over ``H (L - 1)(B - 1)`` degrees of freedom is the per-line noise of one pass
(Scheffé 1959, The Analysis of Variance, ch. 4; from memory). The image means then carry ``sigma / sqrt(L)``.
Minimising the squared line residuals with a free offset per line gives the same vertex as the parabola of
the image means, so the vertex is that of the image means and only its error uses the lines.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import lift_models as lm
from .decomposition import fit_mean_bias_grid
from .noise_floor import NoiseVerdict, noise_verdict, white_noise_std
from .tip_change import TipChange, detect_tip_change

__all__ = ["DECOMPOSITION_MIN_HEIGHTS", "decomposition_needs", "ImagingInputError", "BiasParabola",
           "ImagingAnalysis", "fit_bias_parabola", "analyse_imaging"]

DECOMPOSITION_MIN_HEIGHTS = 3
_MAD_TO_STD = 1.482602218505602  # Gaussian consistency factor of the median absolute deviation


def decomposition_needs(n_heights: int) -> str:
    """The plain sentence for a series too short for the decomposition."""
    return (f"The decomposition into magnetic, electrostatic and short-range parts and the recommended lift "
            f"height need at least {DECOMPOSITION_MIN_HEIGHTS} lift heights; this series has {n_heights}, so "
            "they were not computed.")


class ImagingInputError(ValueError):
    """The stack cannot be analysed (shape, heights, biases)."""


@dataclass(frozen=True)
class BiasParabola:
    """The image mean against tip bias with one common vertex (signal units s: N/m or deg).

    ``cpd_v`` is None when the curvature is not significant (below ``min_significance`` of its own standard
    error, or of the sign no electrostatic attraction gives): the mean does not vary with bias beyond noise.
    """

    bias_v: np.ndarray              # (B,)
    mean: np.ndarray                # (H, B) image means
    mean_std: np.ndarray            # (H, B) their standard errors (from the line scatter)
    curvature: np.ndarray           # (H,) a_h in s / V^2
    curvature_std: np.ndarray       # (H,)
    offset: np.ndarray              # (H,) c_h: the mean at V_cpd (bias-independent part)
    vertex_v: float                 # the fitted vertex, significant or not
    vertex_std_v: float
    cpd_v: float | None
    cpd_std_v: float | None
    line_noise: float               # per-line noise of one pass [s]
    line_noise_dof: int
    reduced_chi2: float
    sentence: str

    def model(self, volts) -> np.ndarray:
        """The fitted parabola at ``volts``: (H, len(volts))."""
        v = np.atleast_1d(np.asarray(volts, float))
        return self.curvature[:, None] * (v[None] - self.vertex_v) ** 2 + self.offset[:, None]


def _line_means(stack: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean of every line of every image, (H, B, L), and the lines valid in every image of their height."""
    with np.errstate(invalid="ignore"):
        counts = np.isfinite(stack).sum(axis=-1)
        means = np.nansum(stack, axis=-1) / np.where(counts > 0, counts, 1)
    ok = (counts > 0).all(axis=1)  # (H, L)
    return means, ok


def fit_bias_parabola(stack, *, bias_v, attractive_sign: float = 1.0, min_significance: float = 3.0) -> BiasParabola:
    """Fit ``a_h (V - V_cpd)^2 + c_h`` to the image means of a (heights, biases, lines, pixels) stack.

    Parameters
    ----------
    stack : ndarray (H, B, L, P)
        Signal per pixel (force gradient [N/m] or phase [deg]); NaN = missing.
    bias_v : array_like (B,)
        Tip biases [V], at least three distinct values.
    attractive_sign : float
        +1 when the signal is a force gradient (an electrostatic attraction is positive), -1 for phase.
    min_significance : float
        Curvature below this many of its standard errors gives no V_cpd (rule of thumb, no source).

    Returns
    -------
    BiasParabola
        See the module docstring for the error model (Hudlet et al. 1998 for the parabola).
    """
    s = np.asarray(stack, float)
    volts = np.asarray(bias_v, float)
    if s.ndim != 4 or s.shape[1] != volts.size:
        raise ImagingInputError(f"stack must be (heights, biases={volts.size}, lines, pixels), got {s.shape}")
    if np.unique(volts).size < 3:
        raise ImagingInputError(f"V_cpd from the bias parabola needs at least 3 distinct biases, got "
                                f"{np.unique(volts).size}")
    nh, nb = s.shape[:2]
    y, ok = _line_means(s)
    n_lines = ok.sum(axis=1)  # per height
    if np.any(n_lines < 2):
        raise ImagingInputError("V_cpd needs at least two complete lines at every height")
    y = np.where(ok[:, None, :], y, np.nan)
    mean = np.nanmean(y, axis=-1)  # (H, B)
    # interaction residual of lines x biases, per height
    r = y - np.nanmean(y, axis=1, keepdims=True) - (mean - mean.mean(axis=1, keepdims=True))[..., None]
    dof = int(((n_lines - 1) * (nb - 1)).sum())
    sigma = float(np.sqrt(np.nansum(r**2) / max(dof, 1)))
    sd = np.repeat((sigma / np.sqrt(n_lines))[:, None], nb, axis=1)
    sd = np.maximum(sd, 1e-300)
    fit = fit_mean_bias_grid(mean, sd, bias_v=volts)
    # the errors come from the line scatter, measured on many degrees of freedom; the fit's own scaling by the
    # reduced chi-square of the few image means (H B - 2H - 1 degrees of freedom) would inflate them at random
    # (by 13 % on average at 5 biases), so it is undone and applied only where the parabola misfits clearly
    fit_dof = nh * nb - (2 * nh + 1)
    cov = fit.covariance / max(fit.reduced_chi2, 1.0)
    misfit = fit_dof > 0 and _chi2_sf(fit.reduced_chi2 * fit_dof, fit_dof) < 0.01
    if misfit:
        cov = cov * fit.reduced_chi2
    a = fit.parameters[1:1 + nh]
    c = fit.parameters[1 + nh:]
    a_sd = np.sqrt(np.diag(cov)[1:1 + nh])
    vertex, vertex_sd = float(fit.cpd_v), float(np.sqrt(cov[0, 0]))
    signed = attractive_sign * a
    significant = bool(np.all(np.isfinite(a_sd))) and bool(np.any(signed > min_significance * a_sd))
    if significant:
        cpd, cpd_sd = vertex, vertex_sd
        sentence = (f"V_cpd = {cpd:.4g} ± {cpd_sd:.2g} V from the parabola of the image mean over {nb} biases"
                    + (f" (common vertex at {nh} heights)" if nh > 1 else "") + "; error from the scatter of "
                    f"{int(n_lines.sum())} line means"
                    + (f", widened by the parabola's misfit (reduced chi-square {fit.reduced_chi2:.3g})." if misfit
                       else "."))
    else:
        cpd = cpd_sd = None
        sentence = (f"The image mean does not vary with the tip bias beyond noise (curvature "
                    f"{np.max(signed / np.maximum(a_sd, 1e-300)):.2g} of its standard errors, fewer than "
                    f"{min_significance:g}, or of the wrong sign): V_cpd is not determined.")
    return BiasParabola(volts, mean, sd, a, a_sd, c, vertex, vertex_sd, cpd, cpd_sd, sigma, dof,
                        float(fit.reduced_chi2), sentence)


def _chi2_sf(x: float, dof: int) -> float:
    from scipy.stats import chi2

    return float(chi2.sf(x, dof))


@dataclass(frozen=True)
class ImagingAnalysis:
    """What a series of one or two lift heights tells (see the module docstring). :meth:`to_dict` for JSON.

    ``image_*`` arrays are (H,) or, with a bias grid, (H, B), in degrees. ``contrast_rms_deg`` is the rms
    about the image mean with the reference noise taken out in quadrature.
    """

    heights_m: np.ndarray
    bias_v: np.ndarray | None
    image_mean_deg: np.ndarray
    image_mean_std_deg: np.ndarray
    image_rms_deg: np.ndarray
    contrast_rms_deg: np.ndarray
    mean_std_source: str
    reference_noise_deg: float
    noise_source: str
    noise: NoiseVerdict
    tip_change: TipChange | None
    parabola: BiasParabola | None
    parabola_deg: np.ndarray | None     # the fitted parabola in degrees on ``parabola_bias_v``: (H, n)
    parabola_bias_v: np.ndarray | None
    nan_pixels: int
    signal_space: str                   # "gradient" (k and Q given) or "phase"
    decomposition_sentence: str

    kind = "imaging"

    @property
    def heights_nm(self) -> np.ndarray:
        return self.heights_m * 1e9

    @property
    def mean_phase_deg(self) -> np.ndarray:
        return self.image_mean_deg

    @property
    def cpd_v(self) -> float | None:
        return None if self.parabola is None else self.parabola.cpd_v

    @property
    def cpd_std_v(self) -> float | None:
        return None if self.parabola is None else self.parabola.cpd_std_v

    @property
    def cpd_needs_sentence(self) -> str:
        n = 0 if self.bias_v is None else int(np.unique(self.bias_v).size)
        return f"V_cpd needs at least three distinct biases; this series has {n}."

    @property
    def messages(self) -> tuple[str, ...]:
        out = [self.decomposition_sentence, self.noise.sentence]
        if self.parabola is not None:
            out.append(self.parabola.sentence)
        elif self.bias_v is not None:
            out.append(self.cpd_needs_sentence)
        if self.tip_change is not None:
            out.append(self.tip_change.sentence)
        return tuple(out)

    def to_dict(self) -> dict:
        """JSON-ready: only what was measured (no decomposition keys, no recommended lift height)."""
        def lst(a):
            return np.asarray(a, float).tolist()

        out = {
            "kind": self.kind,
            "heights_nm": lst(np.round(self.heights_nm, 9)),
            "decomposition": self.decomposition_sentence,
            "image_mean_deg": lst(self.image_mean_deg),
            "image_mean_std_deg": lst(self.image_mean_std_deg),
            "image_rms_deg": lst(self.image_rms_deg),
            "contrast_rms_deg": lst(self.contrast_rms_deg),
            "mean_std_source": self.mean_std_source,
            "phase_noise_deg": self.noise.measured_phase_noise_deg,
            "noise_source": self.noise_source,
            "thermal_phase_noise_deg": self.noise.thermal_phase_noise_deg,
            "noise_verdict": self.noise.verdict,
            "noise_sentence": self.noise.sentence,
            "nan_pixels": int(self.nan_pixels),
            "signal_space": self.signal_space,
        }
        if self.bias_v is not None:
            out["bias_v"] = lst(self.bias_v)
            if self.parabola is None:
                out["cpd_sentence"] = self.cpd_needs_sentence
        if self.parabola is not None:
            out.update(cpd_v=self.parabola.cpd_v, cpd_std_v=self.parabola.cpd_std_v, cpd_sentence=self.parabola.sentence,
                       bias_parabola_reduced_chi2=self.parabola.reduced_chi2)
        if self.tip_change is not None:
            out.update(tip_changed_sample=self.tip_change.irreversible,
                       tip_changed_fraction=self.tip_change.changed_fraction, tip_change=self.tip_change.sentence)
        return out


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
            sig = lm.gradient_from_phase_deg(s4, spring_constant_n_per_m=k, quality_factor=qf)
        else:
            sig = s4
        parabola = fit_bias_parabola(sig, bias_v=volts, attractive_sign=1.0 if exact else -1.0)
        grid_v = np.linspace(volts.min(), volts.max(), 101)
        model = parabola.model(grid_v)
        parabola_deg = (lm.phase_deg_from_gradient(model, spring_constant_n_per_m=k, quality_factor=qf) if exact
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
