"""One entry point for a lift-height series: :func:`analyse_series`.

Conventions (see :mod:`assistant.analysis.lift_models`): phase = -arctan(Q F'/k), attractive -> negative;
during a second pass the oscillation centre sits ``gap_offset_m + lift height`` above the surface
(``gap_offset_m`` defaults to ``amplitude_m``, the peak amplitude, so the closest approach equals the lift
height). With k and Q the phase is turned into the force gradient per pixel (exact), otherwise the analysis
works on the phase itself (small-angle approximation); reported parts are the phase each alone would give.

Edges: a real scan is a window onto an unbounded field, not a period of it. Three estimators:

* ``edge="reflect"``: the per-frequency fit in the cosine basis of the scan reflected at its edges
  (:func:`~assistant.analysis.continuation_reflect.fit_continuation_reflect`), on images aligned by a
  band-limited shift of their reflected extension, the drift refined jointly with the fit
  (:mod:`~assistant.analysis.align_reflect`). As fast as the periodic fit; the reflection misfits within a
  few continuation lengths of the edges, so the noise, the residual and the magnetic rms are taken over the
  interior, away from an edge band of ``edge_band_px`` pixels.
* ``edge="window"``: the field outside the window is fitted as missing data
  (:func:`~assistant.analysis.decomposition.fit_continuation_windowed`); drift enters the model, so the
  images are never interpolated. Right up to the edges, but one to two hundred times slower.
* ``edge="periodic"``: the plain FFT fit, exact only for scans periodic in the window (a non-periodic
  synthetic crop: magnetic rms +9 % at the lowest height and a residual ten times the noise).
* ``edge="auto"`` (default): the reflected-edge fit, checked: where its residual is above noise at a height
  that meets the short-range and significance criteria (small scans, high signal-to-noise), the windowed fit
  is used instead and ``edge_note`` says why.

The magnetic image is reported about its mean: the magnetic mean over the window cannot be told apart from
the image-mean parts and stays with them.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from . import decomposition as dec
from . import lift_models as lm
from .align_reflect import average_biases, fit_with_drift_reflect
from .interaction_regime import InteractionRegime, classify_interaction, recommendation_with_regime
from .noise_floor import NoiseVerdict, noise_verdict, periodic_component_of, white_noise_std
from .recommend import Recommendation, recommend_lift
from .registration import align_stack, shift_from_spectra
from .tip_change import TipChange, detect_tip_change

__all__ = ["SeriesInputError", "TooFewHeightsError", "HeightsMismatchError", "HeightsNotIncreasingError",
           "ImageShapeError", "TooFewBiasesError", "TooManyInvalidPixelsError", "SeriesAnalysis", "analyse_series"]


class SeriesInputError(ValueError):
    """Root of the input errors of :func:`analyse_series`."""


class TooFewHeightsError(SeriesInputError):
    """Fewer than three lift heights."""


class HeightsMismatchError(SeriesInputError):
    """The number of heights differs from the stack."""


class HeightsNotIncreasingError(SeriesInputError):
    """Heights not strictly increasing."""


class ImageShapeError(SeriesInputError):
    """Images of different shapes, or a stack of the wrong dimensionality."""


class TooFewBiasesError(SeriesInputError):
    """A bias grid with fewer than three biases, or biases not matching the stack."""


class TooManyInvalidPixelsError(SeriesInputError):
    """More NaN pixels than the limit."""


@dataclass(frozen=True)
class SeriesAnalysis:
    """Decomposition of a lift-height series. Arrays for figures; :meth:`to_dict` for JSON.

    Every ``*_deg`` part is the phase that part alone would give (``-arctan(Q F'/k)`` of its gradient when k
    and Q are known; otherwise the small-angle phase itself). ``magnetic_rms_deg`` is the rms over the scan of
    the denoised magnetic image at each height with the fit noise subtracted in quadrature;
    ``magnetic_deg`` are those images (H, rows, cols) in the first height's frame. ``electrostatic_mean_deg``
    is (H,) or, with a bias grid, (H, B); ``short_range_mean_deg`` (H,) is the bias-independent remainder.
    ``*_std_*`` are standard errors (covariances scaled by the reduced chi-square when above one);
    ``part_correlation`` is the correlation of the two mean parts at each height. ``noise_deg`` is the
    per-pixel noise of each height's (bias-averaged) image from the fit, ``reference_noise_deg`` an
    independent estimate for one image (repeat pass, else the highest frequencies of the top height).
    ``residual_at_noise`` compares the residual rms away from an edge band of ``edge_band_px`` pixels
    (``residual_rms_interior_deg``) with what that reference noise alone would leave
    (``expected_residual_rms_deg``), within ``residual_tolerance``. With ``edge="reflect"`` the magnetic
    rms is taken over that interior too. ``drift_px`` is (H, 2) or
    (H, B, 2), ``[drow, dcol]`` displacement of the content relative to the first image.
    """

    heights_m: np.ndarray
    pixel_m: tuple[float, float]        # (row spacing, column spacing)
    bias_v: np.ndarray | None
    magnetic_rms_deg: np.ndarray
    magnetic_rms_std_deg: np.ndarray
    electrostatic_mean_deg: np.ndarray
    electrostatic_mean_std_deg: np.ndarray
    short_range_mean_deg: np.ndarray
    short_range_mean_std_deg: np.ndarray
    part_correlation: np.ndarray
    mean_phase_deg: np.ndarray          # measured image mean (H,) or (H, B)
    mean_phase_std_deg: np.ndarray
    residual_rms_deg: np.ndarray
    expected_residual_rms_deg: np.ndarray   # what pure noise (reference noise) would leave
    residual_rms_interior_deg: np.ndarray   # away from the edge band
    edge_band_px: int
    edge: str                               # estimator: "reflect", "window" or "periodic"
    noise_deg: np.ndarray               # per-height noise of the fitted (bias-averaged) images
    reference_noise_deg: float          # independent noise estimate of one image
    residual_at_noise: np.ndarray
    drift_px: np.ndarray                # (H, 2) or (H, B, 2)
    cpd_v: float | None
    cpd_std_v: float | None
    separable: bool
    separability_sentence: str
    resolution_period_m: np.ndarray
    recommendation: Recommendation
    noise: NoiseVerdict
    tip_change: TipChange | None
    magnetic_deg: np.ndarray            # (H, rows, cols) denoised magnetic image per height
    residual_deg: np.ndarray            # (H, rows, cols)
    nan_pixels: int
    signal_space: str                   # "gradient" (k and Q given) or "phase"
    fitted_parameters: dict
    edge_note: str = ""                 # why the estimator differs from the default's first choice
    interaction: InteractionRegime | None = None  # tip-sample interaction regime (set by analyse_series)

    @property
    def heights_nm(self) -> np.ndarray:
        return self.heights_m * 1e9

    @property
    def messages(self) -> tuple[str, ...]:
        """Plain-language statements: recommendation, separability, noise, tip change."""
        out = [self.recommendation.sentence, self.separability_sentence, self.noise.sentence]
        if self.tip_change is not None:
            out.append(self.tip_change.sentence)
        if self.edge_note:
            out.append(self.edge_note)
        if self.interaction is not None:
            out.append(self.interaction.evidence)
        return tuple(out)

    def to_dict(self) -> dict:
        """JSON-ready summary (lists and floats; None for missing)."""
        def lst(a):
            return np.asarray(a, float).tolist()

        drift = self.drift_px if self.drift_px.ndim == 2 else self.drift_px.mean(axis=1)
        rec = self.recommendation
        out = {
            "heights_nm": lst(np.round(self.heights_nm, 9)),  # no 30.000000000000004 from the m -> nm round trip
            "magnetic_rms_deg": lst(self.magnetic_rms_deg),
            "magnetic_rms_std_deg": lst(self.magnetic_rms_std_deg),
            "electrostatic_mean_deg": lst(self.electrostatic_mean_deg),
            "electrostatic_mean_std_deg": lst(self.electrostatic_mean_std_deg),
            "short_range_mean_deg": lst(self.short_range_mean_deg),
            "short_range_mean_std_deg": lst(self.short_range_mean_std_deg),
            "residual_rms_deg": lst(self.residual_rms_deg),
            "drift_px": lst(drift),
            "cpd_v": self.cpd_v,
            "cpd_std_v": self.cpd_std_v,
            "recommended_lift_nm": None if rec.lift_height_m is None else round(rec.lift_height_m * 1e9, 9),
            "recommended_bias_v": rec.bias_v,
            "recommendation": rec.sentence,
            "separable": self.separable,
            "separability": self.separability_sentence,
            "part_correlation": lst(self.part_correlation),
            "expected_residual_rms_deg": lst(self.expected_residual_rms_deg),
            "residual_rms_interior_deg": lst(self.residual_rms_interior_deg),
            "edge_band_px": int(self.edge_band_px),
            "edge": self.edge,
            "edge_note": self.edge_note,
            "residual_at_noise": [bool(x) for x in self.residual_at_noise],
            "noise_deg": lst(self.noise_deg),
            "phase_noise_deg": self.noise.measured_phase_noise_deg,
            "thermal_phase_noise_deg": self.noise.thermal_phase_noise_deg,
            "noise_verdict": self.noise.verdict,
            "noise_sentence": self.noise.sentence,
            "resolution_period_nm": [None if not np.isfinite(x) else x * 1e9 for x in self.resolution_period_m],
            "nan_pixels": int(self.nan_pixels),
            "signal_space": self.signal_space,
            "tip_changed_sample": None if self.tip_change is None else self.tip_change.irreversible,
            "tip_changed_fraction": None if self.tip_change is None else self.tip_change.changed_fraction,
        }
        if self.drift_px.ndim == 3:
            out["drift_px_per_bias"] = lst(self.drift_px)
        if self.interaction is not None:
            out.update(self.interaction.to_dict())
        return out


def _validate(phase_deg, heights_m, bias_v):
    if isinstance(phase_deg, (list, tuple)):
        shapes = {np.shape(p) for p in phase_deg}
        if len(shapes) > 1:
            raise ImageShapeError(f"images of different shapes: {sorted(shapes)}; all must be the same")
    stack = np.asarray(phase_deg, dtype=float)
    if stack.ndim not in (3, 4):
        raise ImageShapeError(f"phase_deg must be (heights, rows, cols) or (heights, biases, rows, cols), "
                              f"got shape {stack.shape}")
    h = np.atleast_1d(np.asarray(heights_m, dtype=float))
    if h.ndim != 1 or h.size < 3:
        raise TooFewHeightsError(f"need at least 3 lift heights, got {h.size}")
    if h.size != stack.shape[0]:
        raise HeightsMismatchError(f"{h.size} heights given but the stack has {stack.shape[0]}")
    if not np.all(np.isfinite(h)) or np.any(np.diff(h) <= 0):
        raise HeightsNotIncreasingError(f"heights must be finite and strictly increasing, got {h.tolist()} m")
    if min(stack.shape[-2:]) < 8:
        raise ImageShapeError(f"images must be at least 8 x 8 pixels, got {stack.shape[-2:]}")
    volts = None
    if stack.ndim == 4:
        if bias_v is None:
            raise TooFewBiasesError("a (heights, biases, rows, cols) stack needs bias_v")
        volts = np.atleast_1d(np.asarray(bias_v, dtype=float))
        if volts.size != stack.shape[1]:
            raise TooFewBiasesError(f"{volts.size} biases given but the stack has {stack.shape[1]}")
        if np.unique(volts).size < 3:
            raise TooFewBiasesError(f"a bias grid needs at least 3 distinct biases, got {np.unique(volts).size}")
    return stack, h, volts


def analyse_series(phase_deg, *, heights_m, pixel_m, bias_v=None, repeat_phase_deg=None,
                   spring_constant_n_per_m: float | None = None, quality_factor: float | None = None,
                   resonance_hz: float | None = None, tip_radius_m: float = 30e-9,
                   cone_half_angle_deg: float | None = 15.0, cone_height_m: float = 10e-6,
                   amplitude_m: float = 10e-9, gap_offset_m: float | None = None, bandwidth_hz: float | None = None,
                   temperature_k: float = 298.15, short_range_fraction: float = 0.1, max_nan_fraction: float = 0.05,
                   residual_tolerance: float = 1.25, register: bool = True, n_refine: int = 2,
                   edge: str = "auto", max_phase_deg: float = 45.0) -> SeriesAnalysis:
    """Decompose a lift-height series into magnetic, electrostatic and short-range parts.

    Parameters
    ----------
    phase_deg : array_like
        Second-pass phase [deg], (heights, rows, cols) or (heights, biases, rows, cols); NaN = missing.
    heights_m : array_like
        Lift heights [m], at least 3, strictly increasing.
    pixel_m : float or (float, float)
        Pixel spacing [m]: one value for square pixels, else (spacing between lines, spacing along a line).
    bias_v : array_like, optional
        Tip biases [V] of a bias grid (at least 3); a scalar is accepted and ignored for a 3-D stack.
    repeat_phase_deg : ndarray (rows, cols), optional
        The first height (first bias) repeated at the end of every line; (biases, rows, cols) is accepted
        and its first bias used.
    spring_constant_n_per_m, quality_factor : float, optional
        k [N/m] and Q: with both the phase is inverted exactly to the force gradient.
    resonance_hz, bandwidth_hz, temperature_k : float
        For the thermal noise limit (Albrecht et al. 1991).
    tip_radius_m, cone_half_angle_deg, cone_height_m : float
        Tip geometry for the electrostatic shape (exact sphere + Hudlet cone; None = no cone) and vdW.
    amplitude_m : float
        Peak oscillation amplitude [m] (finite-amplitude weighting, Giessibl 2001).
    gap_offset_m : float, optional
        Oscillation centre above the surface at zero lift [m]; defaults to ``amplitude_m``.
    short_range_fraction : float
        Largest acceptable short-range / magnetic-contrast ratio for the recommended height.
    max_nan_fraction : float
        Largest acceptable fraction of NaN pixels in any image.
    residual_tolerance : float
        A height's interior residual within this factor of what the independent noise estimate would leave
        counts as "at noise".
    register : bool
        Estimate and undo drift.
    n_refine : int
        Rounds of refining the drift against the leave-one-out continuation (periodic and windowed estimators;
        the reflected-edge one refines it with its own fit until the steps fall below 0.005 px).
    max_phase_deg : float
        Pixels whose phase shift exceeds this magnitude are left out of the fit: there the tip touches the
        surface or feels a gradient far beyond the small-perturbation picture of a second pass (the
        inversion ``-arctan`` diverges at 90 deg). Rule of thumb, no source.
    edge : {"auto", "reflect", "window", "periodic"}
        "reflect": the scan reflected at its edges (cosine-basis fit; noise, residual and magnetic rms
        judged away from an edge band). "window": the scan is a window onto a larger field (the field
        outside is fitted as missing data; everything judged on every pixel; slow). "periodic": the scan is
        one period of the field (plain FFT fit; residual judged away from an edge band, where the seam of a
        non-periodic scan misfits). "auto" (default): "reflect", and "window" instead where the reflected
        fit's residual is above noise at a height that meets the other criteria (see
        :func:`_reflection_mattered`).
    """
    if edge not in ("auto", "reflect", "window", "periodic"):
        raise SeriesInputError(f"edge must be 'auto', 'reflect', 'window' or 'periodic', got {edge!r}")
    params = {k: v for k, v in locals().items() if k not in ("phase_deg", "edge")}  # every other keyword, as given
    if edge != "auto":
        return _with_regime(_decompose(phase_deg, edge=edge, **params), phase_deg, params)
    fast = _decompose(phase_deg, edge="reflect", **params)
    heights = _reflection_mattered(fast)
    if not heights:
        return _with_regime(fast, phase_deg, params)
    exact = _decompose(phase_deg, edge="window", **params)
    note = ("The reflected-edge fit left a residual above noise at " + ", ".join(f"{x:.4g}" for x in heights)
            + " nm, where the other criteria hold; the windowed fit, exact up to the edges, was used instead.")
    return _with_regime(dataclasses.replace(exact, edge_note=note), phase_deg, params)


def _with_regime(a: SeriesAnalysis, phase_deg, params: dict) -> SeriesAnalysis:
    """Name the tip-sample interaction regime and restrict the advice to heights where it is negligible."""
    regime = classify_interaction(a, phase_deg, **{k: params[k] for k in (
        "repeat_phase_deg", "spring_constant_n_per_m", "quality_factor", "tip_radius_m", "amplitude_m",
        "gap_offset_m")})
    return dataclasses.replace(a, interaction=regime, tip_change=regime.tip_change,
                               recommendation=recommendation_with_regime(a.recommendation, regime))


def _reflection_mattered(a: SeriesAnalysis) -> list[float]:
    """Heights [nm] that meet the short-range and significance criteria but failed the residual check.

    There the reflection's misfit near the edges, which grows with the signal-to-noise ratio and with the
    continuation range against the scan size, may have set the advice or biased the magnetic rms (on 64 x 64
    and 128 x 128 synthetic crops with 0.01-0.05 deg noise it failed heights that the windowed fit passed,
    and took the magnetic rms 5 % off on the smaller one).
    """
    crit = a.recommendation.criteria
    bad = crit["short_range_ok"] & crit["magnetic_ok"] & ~crit["residual_ok"]
    return [float(x) for x in a.heights_nm[bad]]


def _decompose(phase_deg, *, heights_m, pixel_m, bias_v, repeat_phase_deg, spring_constant_n_per_m,
               quality_factor, resonance_hz, tip_radius_m, cone_half_angle_deg, cone_height_m, amplitude_m,
               gap_offset_m, bandwidth_hz, temperature_k, short_range_fraction, max_nan_fraction,
               residual_tolerance, register, n_refine, edge, max_phase_deg) -> SeriesAnalysis:
    stack, h, volts = _validate(phase_deg, heights_m, bias_v)
    try:
        pixel_m = dec.pixel_pair_m(pixel_m)
    except ValueError as exc:
        raise SeriesInputError(str(exc)) from None
    grid = stack.ndim == 4
    s4 = stack if grid else stack[:, None]
    nh, nb, rows, cols = s4.shape
    bad = ~np.isfinite(s4)
    nan_frac = bad.reshape(nh * nb, -1).mean(axis=1)
    if nan_frac.max() > max_nan_fraction:
        raise TooManyInvalidPixelsError(f"NaN fraction {nan_frac.max():.3g} in an image exceeds the limit "
                                        f"max_nan_fraction={max_nan_fraction:g}")
    exact = spring_constant_n_per_m is not None and quality_factor is not None
    if exact:
        k, qf = float(spring_constant_n_per_m), float(quality_factor)
        sig = lm.gradient_from_phase_deg(s4, spring_constant_n_per_m=k, quality_factor=qf)
        lin = qf / k * 180.0 / np.pi  # d|phase|/d signal at zero

        def to_deg(x):
            return lm.phase_deg_from_gradient(x, spring_constant_n_per_m=k, quality_factor=qf)

        def slope(x):
            return lin / (1.0 + (qf * np.asarray(x) / k) ** 2)
    else:
        sig = s4
        lin = 1.0

        def to_deg(x):
            return np.asarray(x, float)

        def slope(x):
            return np.ones_like(np.asarray(x, float))

    ok = ~bad & ~(np.abs(np.where(bad, 0.0, s4)) > max_phase_deg)
    n_ok = ok.sum(axis=(-2, -1))
    means = np.where(ok, sig, 0.0).sum(axis=(-2, -1)) / n_ok
    centred = np.where(ok, sig - means[..., None, None], 0.0)

    # registration: every (height, bias) image against the first, then refined against the continuation
    flat = centred.reshape(nh * nb, rows, cols)
    okf = ok.reshape(nh * nb, rows, cols)
    drift = np.zeros((nh * nb, 2))
    shape = (rows, cols)
    # the first estimate correlates periodic spectra: on a non-periodic scan the seam where opposite edges
    # meet stays put while the content drifts, so the seam is taken out first (periodic-plus-smooth
    # decomposition)
    reg = flat if edge == "periodic" else np.array([periodic_component_of(img) for img in flat])
    if register:
        spectra = np.fft.rfft2(reg, axes=(-2, -1))
        for i in range(1, nh * nb):  # loop over images, vectorised inside
            drift[i] = shift_from_spectra(spectra[0], spectra[i], shape)
    # edge band: the seam of a periodic fit and the reflection misfit fell to the interior level within
    # about (h_max - h_0) / pixel + 4 px on simulated and synthetic scans
    band = int(min(np.ceil((h[-1] - h[0]) / min(pixel_m)) + 4, min(rows, cols) // 4)) if edge != "window" else 0
    if edge == "reflect":
        # band-limited realignment of the reflected images (nothing wraps round), alternating with the fit and
        # Gauss-Newton drift steps
        fit, drift, aligned, valid = fit_with_drift_reflect(flat, okf, drift, heights_m=h, pixel_m=pixel_m, nb=nb,
                                                            interior_px=band, refine=register)
    else:
        for round_ in range(n_refine + 1 if register else 1):
            aligned = align_stack(reg, drift)
            valid = align_stack(okf.astype(float), np.rint(drift)) > 0.5
            hstack, hvalid = average_biases(aligned, valid, nh, nb)
            # drift rounds with the periodic model (cheap; its leave-one-out template is closed form)
            fit = dec.fit_continuation(hstack, heights_m=h, pixel_m=pixel_m, valid=hvalid)
            if not register or round_ == n_refine:
                break
            # template for each image: the continuation predicted from the *other* heights (nearly noise-free)
            pred_f = np.fft.rfft2(dec.leave_one_out_prediction(hstack, fit), axes=(-2, -1))
            moving_f = np.fft.rfft2(np.where(valid, aligned, 0.0), axes=(-2, -1))
            for i in range(1, nh * nb):
                drift[i] = drift[i] + shift_from_spectra(pred_f[i // nb], moving_f[i], shape)
    if edge == "window":
        # final fit on the raw images: drift in the model, the seam and wrapped borders never fitted
        fit = dec.fit_continuation_windowed(centred.reshape(nh * nb, rows, cols), heights_m=h, pixel_m=pixel_m,
                                            height_index=np.repeat(np.arange(nh), nb), drift_px=drift,
                                            valid=okf)
        # the magnetic window mean is not separable from the image-mean parts (they absorb it)
        fit = dataclasses.replace(fit, model=fit.model - fit.window_mean[:, None, None])
        drift = fit.drift_px
        valid = align_stack(okf.astype(float), np.rint(drift)) > 0.5
        aligned = align_stack(flat, drift)

    # independent noise estimates of one image (signal units). The top height, last bias, has the least
    # magnetic high-q content (window mode: its raw image, which a Fourier shift of a non-periodic scan
    # would ring)
    top = np.where(okf[-1], flat[-1], 0.0) if edge != "periodic" else np.where(valid[-1], aligned[-1], 0.0)
    top_noise = white_noise_std(top)
    tip = None
    ref_noise = top_noise
    if repeat_phase_deg is not None:
        rep = np.asarray(repeat_phase_deg, float)
        rep = rep[0] if rep.ndim == 3 else rep  # (biases, rows, cols): the repeat at the first bias
        first = stack[0] if not grid else stack[0, 0]
        # the change is judged against the top image's noise: the spread of the difference itself would
        # hide a change that covers most of the scan (a tip rewriting a soft film everywhere)
        tip = detect_tip_change(first, rep, noise_deg=top_noise * lin)
        if not tip.irreversible:
            # an unchanged repeat gives the more direct estimate: the difference of two passes
            ref_noise = detect_tip_change(first, rep).noise_deg / lin
    ref_noise_deg = ref_noise * lin
    fitted_ref = ref_noise / np.sqrt(nb)  # noise of a bias-averaged image
    # Residual against noise in the interior: the periodic seam and the reflection leave a misfit along the
    # edges that says nothing about the continuation
    inner = fit.residual[:, band:rows - band, band:cols - band]
    interior_rms = np.sqrt(np.nanmean(inner**2, axis=(1, 2)))
    if fit.unit_residual_rms is not None:  # the reference noise alike at every height, the fit's own weights
        pure_noise = fitted_ref * fit.unit_residual_rms
    else:  # weights 1 / sigma_h^2: the leverage factor of each height
        pure_noise = fitted_ref * fit.expected_residual_rms / np.maximum(fit.noise_std, 1e-300)
    residual_ok = interior_rms <= residual_tolerance * pure_noise

    # image mean: electrostatic + short range
    mean_sd = (fit.noise_std[:, None] * np.sqrt(nb)) / np.sqrt(n_ok)
    if grid:
        mf = dec.fit_mean_bias_grid(means, mean_sd, bias_v=volts)
    else:
        try:
            dc = lm.centre_gap_m(h, amplitude_m=amplitude_m, gap_offset_m=gap_offset_m)
        except ValueError as exc:
            raise SeriesInputError(str(exc)) from None
        e_shape = lm.amplitude_weighted(
            lambda z: 0.5 * lm.tip_capacitance_second_derivative_f_per_m2(
                z, radius_m=tip_radius_m, cone_half_angle_deg=cone_half_angle_deg, cone_height_m=cone_height_m),
            dc, amplitude_m=amplitude_m)
        s_shape = lm.amplitude_weighted(
            lambda z: lm.vdw_sphere_gradient_n_per_m(z, hamaker_j=1.0, radius_m=tip_radius_m), dc,
            amplitude_m=amplitude_m)
        mf = dec.fit_mean_heights(means[:, 0], mean_sd[:, 0], electrostatic_shape=e_shape,
                                  short_range_shape=s_shape, heights_m=h, attractive_sign=1.0 if exact else -1.0)
    es_deg = to_deg(mf.electrostatic)
    es_sd_deg = slope(mf.electrostatic) * mf.electrostatic_std
    sr_deg = to_deg(mf.short_range)
    sr_sd_deg = slope(mf.short_range) * mf.short_range_std

    # magnetic outputs in degrees: rms of the arctan-mapped denoised map, debiased by the fit noise
    mag_deg = to_deg(fit.model)
    mag_rms_sd = fit.magnetic_rms_std * lin
    if edge == "reflect":
        # over the interior, about its mean; the standard error grows as fewer pixels enter (white-noise
        # scaling of the whole-scan one, an approximation)
        core = mag_deg[:, band:rows - band, band:cols - band]
        ms = np.var(core, axis=(-2, -1)) - fit.noise_power * lin**2
        mag_rms_sd = mag_rms_sd * np.sqrt(rows * cols / core[0].size)
    else:
        ms = np.mean(mag_deg**2, axis=(-2, -1)) - fit.noise_power * lin**2
    mag_rms = np.sqrt(np.clip(ms, 0.0, None))
    # resolution as one image at that height would show it (a bias grid averages nb images per height)
    resolution = dec.resolution_period_m(fit, noise_std=fit.noise_std * np.sqrt(nb))
    rec = recommend_lift(heights_m=h, magnetic_rms=mag_rms, magnetic_rms_std=mag_rms_sd, short_range=sr_deg,
                         residual_ok=residual_ok, resolution_period_m=resolution,
                         short_range_fraction=short_range_fraction, cpd_v=mf.cpd_v)
    verdict = noise_verdict(ref_noise_deg, spring_constant_n_per_m=spring_constant_n_per_m,
                            resonance_hz=resonance_hz, quality_factor=quality_factor, temperature_k=temperature_k,
                            bandwidth_hz=bandwidth_hz, amplitude_m=amplitude_m)
    params = {"reduced_chi2_mean": mf.reduced_chi2}
    if not grid and exact:
        params.update(effective_voltage_v=float(np.sqrt(max(mf.parameters[0], 0.0))),
                      hamaker_j=float(mf.parameters[1]))
    return SeriesAnalysis(
        heights_m=h, pixel_m=pixel_m, bias_v=volts, magnetic_rms_deg=mag_rms, magnetic_rms_std_deg=mag_rms_sd,
        electrostatic_mean_deg=es_deg, electrostatic_mean_std_deg=es_sd_deg, short_range_mean_deg=sr_deg,
        short_range_mean_std_deg=sr_sd_deg, part_correlation=mf.correlation,
        mean_phase_deg=to_deg(means if grid else means[:, 0]),
        mean_phase_std_deg=(slope(means) * mean_sd) if grid else (slope(means) * mean_sd)[:, 0],
        residual_rms_deg=fit.residual_rms * lin, expected_residual_rms_deg=pure_noise * lin,
        residual_rms_interior_deg=interior_rms * lin, edge_band_px=band, edge=edge,
        noise_deg=fit.noise_std * lin, reference_noise_deg=float(ref_noise_deg), residual_at_noise=residual_ok,
        drift_px=drift.reshape(nh, nb, 2) if grid else drift.reshape(nh, 2), cpd_v=mf.cpd_v, cpd_std_v=mf.cpd_std_v,
        separable=mf.separable, separability_sentence=mf.sentence, resolution_period_m=resolution,
        recommendation=rec, noise=verdict, tip_change=tip, magnetic_deg=mag_deg, residual_deg=fit.residual * lin,
        nan_pixels=int(bad.sum()), signal_space="gradient" if exact else "phase", fitted_parameters=params)
