"""The decomposition of a lift-height series: :func:`analyse_series`, the one entry point.

Conventions: phase = -arctan(Q F'/k), attractive -> negative (:mod:`.phase`); during a second pass the
oscillation centre sits ``gap_offset_m + lift height`` above the surface (:mod:`.image_mean_models`). With k
and Q the phase is turned into the force gradient per pixel (exact), otherwise the analysis works on the phase
itself (small-angle approximation); reported parts are the phase each alone would give on resonance.

Steps: the phases in signal units (:mod:`.signals`); with a bias grid, the phases inverted again with the drive's
phase offset that the image means give (:mod:`.drive_offset`) and the electrostatic contrast of a contact potential
varying over the scan taken out of every image (:mod:`.lateral_cpd`); registration (:mod:`.registration`), the
magnetic part by Laplace continuation, the image means (:mod:`.image_means`), the noise against the thermal limit
(:mod:`.noise_floor`), the tip change (:mod:`.tip_change`), the advice (:mod:`.recommend`), and last the
tip-sample interaction regime (:mod:`.interaction_regime`), which keeps the advice to heights where the regime is
negligible.

Edges: a real scan is a window onto an unbounded field, not a period of it. Three estimators:

* ``edge="reflect"``: the per-frequency fit in the cosine basis of the scan reflected at its edges
  (:func:`~.reflected.fit_continuation_reflected`), on images aligned by a band-limited shift of their
  reflected extension, the drift refined jointly with the fit (:mod:`.reflected_drift`). As fast as the
  periodic fit; the reflection misfits within a few continuation lengths of the edges, so the noise, the
  residual and the magnetic rms are taken over the interior, away from an edge band of ``edge_band_px`` pixels.
* ``edge="window"``: the field outside the window is fitted as missing data
  (:func:`~.windowed.fit_continuation_windowed`); drift enters the model, so the images are never
  interpolated. Right up to the edges; the whole analysis takes about three times as long.
* ``edge="periodic"``: the plain FFT fit (:mod:`.periodic`), exact only for scans periodic in the window (a
  non-periodic synthetic crop: magnetic rms +9 % at the lowest height and a residual ten times the noise).
* ``edge="auto"`` (default): the reflected-edge fit, always; ``edge_note`` says so where the scan is small
  against the continuation range (a choice made from the geometry alone, :mod:`.estimator_note`).

The magnetic image is reported about its mean: the magnetic mean over the window cannot be told apart from
the image-mean parts and stays with them (:mod:`.mean_parts` reports its typical size).

Every estimate is a smooth function of the data: the noise of each image comes from its highest frequencies
(:mod:`.image_noise`), not from the fit; the drift rounds run until the steps are far below the drift's
standard error; no threshold on a noisy statistic picks a method. The standard errors (:mod:`.standard_errors`,
:mod:`.mean_parts`) propagate that noise to first order; ``tests/analysis/lift_series/test_error_calibration.py``
checks them against the scatter over repeats with fresh noise.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from .continuation import resolution_period_m
from .drive_offset import DriveOffset, drive_offset_sentence, fit_drive_offset, with_offset_error
from .errors import (HeightsMismatchError, HeightsNotIncreasingError, ImageShapeError, SeriesInputError,
                     TooFewBiasesError, TooFewHeightsError, TooManyInvalidPixelsError)
from .estimator_note import ERROR_METHOD, auto_estimator, small_scan_note
from .frequencies import pixel_pair_m
from .image_noise import shrunk_noise_variance
from .image_means import fit_mean_bias_grid
from .interaction_regime import (bias_pair_noise_deg, classify_interaction, finer_repeat_verdict,
                                 recommendation_with_regime)
from .lateral_cpd import add_lateral_cpd, bias_contrast_sentence, contrast_by_bias, lateral_contrast
from .magnetic_fit import fit_magnetic
from .mean_parts import MeanParts, magnetic_window_mean_cov, split_bias_grid, split_heights_only
from .noise_floor import noise_verdict, white_noise_std
from .phase import SignalSpace
from .probe import ProbeModel
from .recommend import recommend_lift
from .result import SeriesAnalysis
from .signals import mean_pixels, series_signals
from .standard_errors import drift_covariance
from .tip_change import detect_tip_change

__all__ = ["analyse_series", "EDGES"]

EDGES = ("auto", "reflect", "window", "periodic")


@dataclass(frozen=True)
class _Options:
    """How the decomposition judges the data (the keyword options of :func:`analyse_series`)."""

    short_range_fraction: float
    max_nan_fraction: float
    residual_tolerance: float
    register: bool
    n_refine: int
    max_phase_deg: float


def analyse_series(phase_deg, *, heights_m, pixel_m, bias_v=None, repeat_phase_deg=None,
                   probe: ProbeModel | None = None, edge: str = "auto", short_range_fraction: float = 0.1,
                   max_nan_fraction: float = 0.05, residual_tolerance: float = 1.25, register: bool = True,
                   n_refine: int = 2, max_phase_deg: float = 45.0, **probe_fields) -> SeriesAnalysis:
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
        The first height (first bias) repeated in every line, after the passes at that height; (biases, rows,
        cols) is accepted and its first bias used.
    probe : ProbeModel, optional
        The probe and how it was operated (k, Q, f0, bandwidth, temperature, tip geometry, amplitude, gap
        offset). In a notebook its fields may be given as keywords instead (``spring_constant_n_per_m=2.8``).
    edge : {"auto", "reflect", "window", "periodic"}
        "reflect": the scan reflected at its edges (cosine-basis fit; noise, residual and magnetic rms
        judged away from an edge band). "window": the scan is a window onto a larger field (the field
        outside is fitted as missing data; everything judged on every pixel; slow). "periodic": the scan is
        one period of the field (plain FFT fit; residual judged away from an edge band, where the seam of a
        non-periodic scan misfits). "auto" (default): "reflect", with a note where the scan is small
        against the continuation range (:func:`~.estimator_note.small_scan_note`).
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
        Rounds of refining the drift against the leave-one-out continuation (periodic estimator; the
        reflected-edge and the windowed ones refine it with their own fits, the reflected one until the steps fall
        below 5e-4 px, the windowed one in the rounds of ``WINDOW_SOLVE``).
    max_phase_deg : float
        Pixels whose phase shift exceeds this magnitude are left out of the fit: there the tip touches the
        surface or feels a gradient far beyond the small-perturbation picture of a second pass (the
        inversion ``-arctan`` diverges at 90 deg). Rule of thumb, no source.
    """
    if edge not in EDGES:
        raise SeriesInputError(f"edge must be 'auto', 'reflect', 'window' or 'periodic', got {edge!r}")
    if probe is not None and probe_fields:
        raise SeriesInputError(f"give the probe either as probe= or as keywords, not both ({sorted(probe_fields)})")
    probe = probe if probe is not None else ProbeModel(**probe_fields)
    options = _Options(short_range_fraction, max_nan_fraction, residual_tolerance, register, n_refine,
                       max_phase_deg)
    inputs = (phase_deg, heights_m, pixel_m, bias_v, repeat_phase_deg, probe, options)
    if edge != "auto":
        return _with_regime(_with_offset_error(inputs, edge), phase_deg, repeat_phase_deg, probe)
    # decided once, from the geometry alone (estimator_note)
    choice, note = auto_estimator(heights_m, pixel_m)
    a = _with_offset_error(inputs, choice)
    note = note or small_scan_note(a.heights_m, a.pixel_m, a.magnetic_deg.shape[-2:])
    return _with_regime(dataclasses.replace(a, edge_note=note) if note else a, phase_deg, repeat_phase_deg, probe)


def _with_offset_error(inputs, edge: str) -> SeriesAnalysis:
    """The decomposition; with a drive offset read from the bias grid, its error in the standard errors
    (:func:`.drive_offset.with_offset_error`, from the decompositions at the offset less and plus its standard
    error) and the advice taken again with them."""
    warm: dict = {}
    offset, a = _decompose(*inputs, edge=edge, warm=warm)
    if offset is None:
        return a
    # at the drift already found: it hardly moves with the offset, and its rounds are most of the time; the
    # windowed fit starts from the first one's field (same grid, nearly the same data)
    lo, hi = (_decompose(*inputs, edge=edge, drift_px=a.drift_px.reshape(-1, 2), warm=dict(warm),
                         offset=dataclasses.replace(offset, offset_deg=offset.offset_deg + side * offset.offset_std_deg)
                         )[1] for side in (-1.0, 1.0))
    probe, options = inputs[5], inputs[6]
    a = with_offset_error(a, lo, hi, offset, SignalSpace(probe.spring_constant_n_per_m, probe.quality_factor))
    rec = recommend_lift(heights_m=a.heights_m, magnetic_rms=a.magnetic_rms_deg,
                         magnetic_rms_std=a.magnetic_rms_std_deg, short_range=a.short_range_mean_deg,
                         residual_ok=a.residual_at_noise,
                         resolution_period_m=a.resolution_period_m, short_range_fraction=options.short_range_fraction,
                         cpd_v=a.cpd_v)
    return dataclasses.replace(a, recommendation=rec)


def _with_regime(a: SeriesAnalysis, phase_deg, repeat_phase_deg, probe: ProbeModel) -> SeriesAnalysis:
    """Name the tip-sample interaction regime and restrict the advice to heights where it is negligible. The
    regime's repeat verdict becomes ``tip_change`` (kept once: the regime is stored without it)."""
    regime = classify_interaction(a, phase_deg, repeat_phase_deg=repeat_phase_deg, probe=probe)
    return dataclasses.replace(a, interaction=dataclasses.replace(regime, tip_change=None),
                               tip_change=regime.tip_change,
                               recommendation=recommendation_with_regime(a.recommendation, regime))


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


def _decompose(phase_deg, heights_m, pixel_m, bias_v, repeat_phase_deg, probe: ProbeModel, options: _Options, *,
               edge: str, offset: DriveOffset | None = None,
               drift_px=None, warm: dict | None = None) -> tuple[DriveOffset | None, SeriesAnalysis]:
    stack, h, volts = _validate(phase_deg, heights_m, bias_v)
    try:
        pixel_m = pixel_pair_m(pixel_m)
    except ValueError as exc:
        raise SeriesInputError(str(exc)) from None
    grid = stack.ndim == 4
    s4 = stack if grid else stack[:, None]
    nh, nb, rows, cols = s4.shape
    bad = ~np.isfinite(s4)
    nan_frac = bad.reshape(nh * nb, -1).mean(axis=1)
    if nan_frac.max() > options.max_nan_fraction:
        raise TooManyInvalidPixelsError(f"NaN fraction {nan_frac.max():.3g} in an image exceeds the limit "
                                        f"max_nan_fraction={options.max_nan_fraction:g}")
    space = SignalSpace(probe.spring_constant_n_per_m, probe.quality_factor)
    ok = ~bad & ~(np.abs(np.where(bad, 0.0, s4)) > options.max_phase_deg)

    def signals_in(sp: SignalSpace):
        return series_signals(s4, ok, sp, heights_m=h, pixel_m=pixel_m, edge=edge, repeat_phase_deg=repeat_phase_deg)

    if not (grid and space.exact):
        offset = None
    elif offset is None:  # the drive's phase offset from the means' bias dependence (as read, weighted by their noise)
        first = signals_in(space)
        start = fit_mean_bias_grid(first.means, first.mean_sd, bias_v=volts)
        offset = fit_drive_offset(s4, mean_pixels(ok), first.mean_sd, bias_v=volts, space=space,
                                  cpd_start_v=float(start.parameters[0]))
    if offset is not None:  # every phase inverted with it
        space = dataclasses.replace(space, offset_deg=offset.offset_deg)
    signals = signals_in(space)
    lin = space.slope_at_zero
    means, n_ok, mean_sd, flat, src, okf = (signals.means, signals.n_ok, signals.mean_sd, signals.flat, signals.src,
                                            signals.okf)
    image_var, dof, alias_axes = signals.image_var, signals.dof, signals.alias_axes
    # edge band: the seam of a periodic fit and the reflection misfit fell to the interior level within
    # about (h_max - h_0) / pixel + 4 px on simulated and synthetic scans
    band = int(min(np.ceil((h[-1] - h[0]) / min(pixel_m)) + 4, min(rows, cols) // 4)) if edge != "window" else 0
    lateral, fit_var, mean_fit = None, image_var, None
    if grid:  # a contact potential that varies over the scan: its electrostatic contrast out first (lateral_cpd)
        mean_fit = fit_mean_bias_grid(means, mean_sd, bias_v=volts)  # the parabolas of the means, fitted once
        lateral = lateral_contrast(src, image_var, mean_fit, bias_v=volts)
        src = src - lateral.contrast
        fit_var = image_var + np.repeat(nb * lateral.added_var, nb)  # as the fit averages the biases
    fit, drift, aligned, valid = fit_magnetic(src, okf, h, pixel_m, nb=nb, edge=edge, band=band, image_var=fit_var,
                                              dof=dof, register=options.register, n_refine=options.n_refine,
                                              drift_px=drift_px, warm=warm)
    drift_cov = None
    if edge == "reflect" and options.register and drift_px is None:  # (a drift given was found, with its errors)
        own_var = image_var if lateral is None else lateral.image_var_after  # each image's noise, as fitted
        drift_cov = drift_covariance(fit.model, fit.decay, 1.0 / own_var, np.repeat(np.arange(nh), nb), band)

    # independent noise estimates of one image (signal units). The top height, last bias, has the least
    # magnetic high-q content (window mode: its raw image, which a Fourier shift of a non-periodic scan
    # would ring)
    top = (np.where(okf[-1], flat[-1], 0.0) if edge != "periodic" or grid  # as taken, before any removal
           else np.where(valid[-1], aligned[-1], 0.0))
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
        # an unchanged repeat gives the more direct estimate, the difference of two passes; a changed one leaves two
        # top passes that differ in bias alone (the top image's band holds magnetic content on coarse lines)
        # judged again at the finer noise of the bias pair, as the interaction regime judges it
        pair = bias_pair_noise_deg(stack)
        changed = finer_repeat_verdict(first, rep, tip, pair).irreversible
        pair = pair if changed else detect_tip_change(first, rep).noise_deg
        ref_noise = pair / lin if pair is not None else ref_noise
    ref_noise_deg = ref_noise * lin
    fitted_ref = ref_noise / np.sqrt(nb)  # noise of a bias-averaged image, and what the removal above adds to it
    if lateral is not None:
        fitted_ref = fitted_ref * np.sqrt(1.0 + nb * lateral.added_var / image_var.reshape(nh, nb).mean(axis=1))
    # Residual against noise in the interior: the periodic seam and the reflection leave a misfit along the
    # edges that says nothing about the continuation
    inner = fit.residual[:, band:rows - band, band:cols - band]
    interior_rms = np.sqrt(np.nanmean(inner**2, axis=(1, 2)))
    if fit.unit_residual_rms is not None:  # the reference noise alike at every height, the fit's own weights
        pure_noise = fitted_ref * fit.unit_residual_rms
    else:  # weights 1 / sigma_h^2: the leverage factor of each height
        pure_noise = fitted_ref * fit.expected_residual_rms / np.maximum(fit.noise_std, 1e-300)
    residual_ok = interior_rms <= options.residual_tolerance * pure_noise

    # image means: the non-magnetic total is measured; only its split depends on the tip (mean_parts)
    weight_sd = np.sqrt(shrunk_noise_variance(image_var, dof).reshape(nh, nb)) / np.sqrt(n_ok)
    mf = _mean_parts(means, mean_sd, weight_sd, fit, h, volts, probe, space, edge, mean_fit)
    if lateral is not None:  # and the bias-independent mean it leaves (lateral_cpd)
        mf = add_lateral_cpd(mf, lateral, okf, bias_v=volts, heights_m=h, noise_dof=dof)
        by_bias = contrast_by_bias(src, lateral.image_var_after, bias_v=volts)  # a contrast the bias changes
        mf = dataclasses.replace(mf, sentence=mf.sentence + bias_contrast_sentence(*by_bias, h))
    if offset is not None:
        mf = dataclasses.replace(mf, sentence=mf.sentence + drive_offset_sentence(
            offset, quality_factor=float(probe.quality_factor), resonance_hz=probe.resonance_hz))
    es_deg = space.to_phase(mf.electrostatic)
    es_sd_deg = space.slope(mf.electrostatic) * mf.electrostatic_std
    sr_deg = space.to_phase(mf.short_range)
    sr_sd_deg = space.slope(mf.short_range) * mf.short_range_std

    # magnetic outputs in degrees: rms of the arctan-mapped denoised map, debiased by the fit noise
    mag_deg = space.to_phase(fit.model)
    mag_rms_sd = fit.magnetic_rms_std * lin
    if edge == "reflect":
        # over the interior, about its mean, as the fit's standard error is
        core = mag_deg[:, band:rows - band, band:cols - band]
        ms = np.var(core, axis=(-2, -1)) - fit.noise_power * lin**2
    else:
        ms = np.mean(mag_deg**2, axis=(-2, -1)) - fit.noise_power * lin**2
    mag_rms = np.sqrt(np.clip(ms, 0.0, None))
    # resolution as one image at that height would show it (a bias grid averages nb images per height)
    resolution = resolution_period_m(fit, noise_std=fit.noise_std * np.sqrt(nb))
    rec = recommend_lift(heights_m=h, magnetic_rms=mag_rms, magnetic_rms_std=mag_rms_sd, short_range=sr_deg,
                         residual_ok=residual_ok, resolution_period_m=resolution,
                         short_range_fraction=options.short_range_fraction, cpd_v=mf.cpd_v)
    verdict = noise_verdict(ref_noise_deg, spring_constant_n_per_m=probe.spring_constant_n_per_m,
                            resonance_hz=probe.resonance_hz, quality_factor=probe.quality_factor,
                            temperature_k=probe.temperature_k, bandwidth_hz=probe.bandwidth_hz,
                            amplitude_m=probe.amplitude_or_assumed_m)
    params = {"reduced_chi2_mean": mf.reduced_chi2}
    drift_sd = drift_mean_sd = None
    if drift_cov is not None:
        drift_sd = np.sqrt(np.clip(np.diagonal(drift_cov, axis1=1, axis2=2).T, 0.0, None))  # (J, 2)
        blocks = drift_cov.reshape(2, nh, nb, nh, nb)[:, np.arange(nh), :, np.arange(nh), :]  # (H, 2, nb, nb)
        drift_mean_sd = np.sqrt(np.clip(blocks.sum(axis=(-2, -1)) / nb**2, 0.0, None))
        drift_sd = drift_sd.reshape(nh, nb, 2) if grid else drift_sd
    slope_t, ref_sd = space.slope(mf.total), float(probe.phase_reference_std_deg or 0.0)  # ref: offsets every image
    return offset, SeriesAnalysis(
        heights_m=h, pixel_m=pixel_m, bias_v=volts, magnetic_rms_deg=mag_rms, magnetic_rms_std_deg=mag_rms_sd,
        electrostatic_mean_deg=es_deg, electrostatic_mean_std_deg=es_sd_deg, short_range_mean_deg=sr_deg,
        short_range_mean_std_deg=sr_sd_deg, part_correlation=mf.correlation,
        mean_phase_deg=space.to_phase(means if grid else means[:, 0]),
        mean_phase_std_deg=(space.slope(means) * mean_sd) if grid else (space.slope(means) * mean_sd)[:, 0],
        residual_rms_deg=fit.residual_rms * lin, expected_residual_rms_deg=pure_noise * lin,
        residual_rms_interior_deg=interior_rms * lin, edge_band_px=band, edge=edge,
        noise_deg=fit.noise_std * lin, reference_noise_deg=float(ref_noise_deg), residual_at_noise=residual_ok,
        drift_px=drift.reshape(nh, nb, 2) if grid else drift.reshape(nh, 2), cpd_v=mf.cpd_v, cpd_std_v=mf.cpd_std_v,
        separable=mf.separable, separability_sentence=mf.sentence, resolution_period_m=resolution,
        recommendation=rec, noise=verdict, tip_change=tip, magnetic_deg=mag_deg, residual_deg=fit.residual * lin,
        nan_pixels=int(bad.sum()), signal_space=space.name, fitted_parameters=params,
        drift_std_px=drift_sd, drift_mean_std_px=drift_mean_sd, nonmagnetic_mean_deg=space.to_phase(mf.total),
        nonmagnetic_mean_std_deg=slope_t * mf.total_std,
        nonmagnetic_mean_model_std_deg=np.hypot(slope_t * mf.total_model_std, ref_sd),
        electrostatic_mean_model_std_deg=space.slope(mf.electrostatic) * mf.electrostatic_model_std,
        short_range_mean_model_std_deg=np.hypot(space.slope(mf.short_range) * mf.short_range_model_std, ref_sd),
        mean_model_fit_deg=None if mf.model_fit is None else space.to_phase(mf.model_fit),
        mean_model_reduced_chi2=mf.reduced_chi2, mean_model_birge_ratio=mf.birge_ratio,
        cpd_model_std_v=mf.cpd_model_std_v, tip_models=_columns(mf.candidates), assumed=dict(mf.assumed),
        split_vs_amplitude={k: np.asarray(v, float) for k, v in (mf.amplitude_range or {}).items()},
        alias_axes=tuple(int(x) for x in alias_axes), error_method=ERROR_METHOD[edge],
        cpd_map_v=None if lateral is None else lateral.cpd_map_v,
        cpd_map_std_v=None if lateral is None else lateral.cpd_map_std_v,
        drive_phase_offset_deg=None if offset is None else offset.offset_deg,
        drive_phase_offset_std_deg=None if offset is None else offset.offset_std_deg, cpd_sentence=mf.cpd_sentence)


def _mean_parts(means, mean_sd, weight_sd, fit, h, volts, probe: ProbeModel, space: SignalSpace,
                edge: str, mean_fit=None) -> MeanParts:
    """The measured non-magnetic total and its electrostatic and short-range parts (signal units). The
    magnetic mean over the window stays in the total, with its covariance from the fitted maps as model
    uncertainty (none on a periodic scan, one period of a film whose mean is zero); the windowed fit's own
    estimate of that mean missed the true one by 0.03-0.24 deg on 64 x 64 synthetic crops, more than its
    typical size, so it is not taken off."""
    nh = h.size
    mm_cov = np.zeros((nh, nh)) if edge == "periodic" else magnetic_window_mean_cov(fit.model)
    if volts is not None:
        return split_bias_grid(means, mean_sd, mm_cov, bias_v=volts, fit=mean_fit)
    try:
        return split_heights_only(means[:, 0], mean_sd[:, 0], mm_cov, heights_m=h, tip_radius_m=probe.tip_radius_m,
                                  tip_radius_rel_std=probe.tip_radius_rel_std,
                                  cone_half_angle_deg=probe.cone_half_angle_deg, cone_height_m=probe.cone_height_m,
                                  amplitude_m=probe.amplitude_m, gap_offset_m=probe.gap_offset_m,
                                  gap_offset_std_m=probe.gap_offset_std_m,
                                  attractive_sign=1.0 if space.exact else -1.0, to_deg=space.to_phase,
                                  weight_std=weight_sd[:, 0])
    except ValueError as exc:
        raise SeriesInputError(str(exc)) from None


def _columns(candidates) -> dict:
    """The tip models as one array per field (a cone angle of None as NaN), for the stored result."""
    rows = [c.to_dict() for c in candidates or ()]
    return {k: np.array([np.nan if r[k] is None else r[k] for r in rows], float) for k in rows[0]} if rows else {}
