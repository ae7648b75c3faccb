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
* ``edge="auto"`` (default): the reflected-edge fit, always; ``edge_note`` says so where the scan is small
  against the continuation range (a choice made from the geometry alone: a switch on the fit's own residual
  flipped with the noise draw).

The magnetic image is reported about its mean: the magnetic mean over the window cannot be told apart from
the image-mean parts and stays with them (:mod:`~assistant.analysis.mean_parts` reports its typical size).

Every estimate is a smooth function of the data: the noise of each image comes from its highest
frequencies (:mod:`~assistant.analysis.series_noise`), not from the fit, the drift rounds run until the
steps are far below the drift's standard error, and no threshold on a noisy statistic picks a method. The
standard errors (:mod:`~assistant.analysis.series_errors`, :mod:`~assistant.analysis.mean_parts`) are
first-order propagations of that noise; ``tests/analysis/test_error_calibration.py`` checks them against
the scatter over repeats with fresh noise.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from . import decomposition as dec
from . import lift_models as lm
from .align_reflect import average_biases, fit_with_drift_reflect
from .noise_floor import NoiseVerdict, noise_verdict, periodic_component_of, white_noise_std
from .recommend import Recommendation, recommend_lift
from .series_errors import drift_covariance
from .mean_parts import ASSUMED_AMPLITUDE_M, TIP_RADIUS_REL_STD, magnetic_window_mean_cov, split_bias_grid, split_heights_only
from .series_noise import band_noise_variance, fill_missing, shrunk_noise_variance
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
    drift_std_px: np.ndarray | None = None       # standard error of drift_px, same shape
    drift_mean_std_px: np.ndarray | None = None  # (H, 2) standard error of the drift averaged over biases
    # the measured non-magnetic total (H,) or (H, B) and the model uncertainties (mean_parts)
    nonmagnetic_mean_deg: np.ndarray | None = None
    nonmagnetic_mean_std_deg: np.ndarray | None = None
    nonmagnetic_mean_model_std_deg: np.ndarray | None = None
    electrostatic_mean_model_std_deg: np.ndarray | None = None
    short_range_mean_model_std_deg: np.ndarray | None = None
    cpd_model_std_v: float | None = None
    alias_axes: tuple = ()              # axes with alias fields, decided from the pixel spacing and lowest height
    error_method: str = ""              # how the standard errors were obtained and checked

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
            "drift_std_px": None if self.drift_mean_std_px is None else lst(self.drift_mean_std_px),
            "cpd_v": self.cpd_v,
            "cpd_std_v": self.cpd_std_v,
            "cpd_model_std_v": self.cpd_model_std_v,
            "nonmagnetic_mean_deg": None if self.nonmagnetic_mean_deg is None else lst(self.nonmagnetic_mean_deg),
            "nonmagnetic_mean_std_deg": None if self.nonmagnetic_mean_std_deg is None
            else lst(self.nonmagnetic_mean_std_deg),
            "nonmagnetic_mean_model_std_deg": None if self.nonmagnetic_mean_model_std_deg is None
            else lst(self.nonmagnetic_mean_model_std_deg),
            "electrostatic_mean_model_std_deg": None if self.electrostatic_mean_model_std_deg is None
            else lst(self.electrostatic_mean_model_std_deg),
            "short_range_mean_model_std_deg": None if self.short_range_mean_model_std_deg is None
            else lst(self.short_range_mean_model_std_deg),
            "mean_model_reduced_chi2": self.fitted_parameters.get("reduced_chi2_mean"),
            "mean_model_birge_ratio": self.fitted_parameters.get("birge_ratio_mean"),
            "tip_models": self.fitted_parameters.get("tip_models"),
            "assumed": self.fitted_parameters.get("assumed"),
            "split_vs_amplitude": self.fitted_parameters.get("split_vs_amplitude"),
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
            "alias_axes": list(self.alias_axes),
            "error_method": self.error_method,
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
                   tip_radius_rel_std: float = TIP_RADIUS_REL_STD,
                   cone_half_angle_deg: float | None = 15.0, cone_height_m: float = 10e-6,
                   amplitude_m: float | None = None, gap_offset_m: float | None = None,
                   bandwidth_hz: float | None = None,
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
        Nominal tip geometry for the electrostatic shape (exact sphere + Hudlet cone; None = no cone) and vdW.
        The split of the image means is averaged over tips with a cone and without, and radii one
        ``tip_radius_rel_std`` either side (see :mod:`~assistant.analysis.mean_parts`).
    tip_radius_rel_std : float
        Relative uncertainty of ``tip_radius_m``.
    amplitude_m : float, optional
        Peak oscillation amplitude [m] (finite-amplitude weighting, Giessibl 2001). None: not known; 10 nm
        is assumed, the split of the image means is taken over 5-20 nm and the sentence says so.
    gap_offset_m : float, optional
        Oscillation centre above the surface at zero lift [m]. None: not known; the amplitude (closest
        approach = lift height) is assumed and offsets down to half the amplitude enter the split's
        uncertainty.
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
        non-periodic scan misfits). "auto" (default): "reflect", with a note where the scan is small
        against the continuation range (see :func:`_small_scan_note`).
    """
    if edge not in ("auto", "reflect", "window", "periodic"):
        raise SeriesInputError(f"edge must be 'auto', 'reflect', 'window' or 'periodic', got {edge!r}")
    params = {k: v for k, v in locals().items() if k not in ("phase_deg", "edge")}  # every other keyword, as given
    if edge != "auto":
        return _decompose(phase_deg, edge=edge, **params)
    # decided once, from the geometry alone: a switch on the fit's own residual flipped with the noise draw
    # between two estimators whose answers differ by far more than their standard errors
    a = _decompose(phase_deg, edge="reflect", **params)
    note = _small_scan_note(a)
    return dataclasses.replace(a, edge_note=note) if note else a


ERROR_METHOD = {
    "reflect": "first-order propagation of the measured white noise through fits with fixed weights; checked "
               "against the scatter over repeats with fresh noise (64-256 px crops: 0.8-1.25)",
    "window": "periodic approximation on the window grid; not checked by Monte Carlo (the magnetic rms scattered "
              "0.8-2.9 times its error on 64 x 64 crops)",
    "periodic": "per-frequency closed form for a periodic scan; not checked by Monte Carlo",
}

SMALL_SCAN_FRACTION = 0.12  # continuation range against the scan size from which the note is given


def _small_scan_note(a: SeriesAnalysis) -> str:
    """Say so where the scan is small against the continuation range (``(h_max - h_0) / pixel`` along an axis).

    There the reflection's misfit near the edges reaches the interior. Measured on synthetic thin-film crops
    (8 heights 20-140 nm, 10 nm pixels, 0.01 deg noise, 4 patterns), largest error of the magnetic rms below the
    two top heights / at the second highest / at the top: 64 px (range 19 % of the scan) 0.44 / 1.4 / 3.9 %,
    80 px 0.22 / 0.8 / 2.9 %, 96 px (12.5 %) 0.27 / 0.8 / 2.2 %, 128 px (9 %) 0.06 / 0.2 / 0.6 %; on the small
    ones the residual also rose above noise at most heights.
    """
    rows, cols = a.magnetic_deg.shape[-2:]
    span = float(a.heights_m[-1] - a.heights_m[0])
    frac = max(span / a.pixel_m[0] / rows, span / a.pixel_m[1] / cols)
    if frac < SMALL_SCAN_FRACTION:
        return ""
    return (f"The scan is small against the continuation range ({frac:.0%} of it): the reflected-edge fit's misfit "
            "near the edges reaches the interior (on synthetic crops of this proportion the magnetic rms stayed "
            "within 0.5 % but at the two top heights, off by up to 4 % at the top, and the residual rose above "
            "noise at most heights, which holds back the recommendation); --edge window fits the field outside "
            "the scan instead, at 100-500 times the cost, with approximate standard errors.")


def _decompose(phase_deg, *, heights_m, pixel_m, bias_v, repeat_phase_deg, spring_constant_n_per_m,
               quality_factor, resonance_hz, tip_radius_m, tip_radius_rel_std, cone_half_angle_deg, cone_height_m,
               amplitude_m,
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
    src = flat if okf.all() else fill_missing(flat, okf)  # holes filled smoothly: no broadband spikes
    reg = src if edge == "periodic" else np.array([periodic_component_of(img) for img in src])
    spectra = np.fft.rfft2(reg, axes=(-2, -1))
    if register:
        for i in range(1, nh * nb):  # loop over images, vectorised inside
            drift[i] = shift_from_spectra(spectra[0], spectra[i], shape)
    # the noise of every image from its highest frequencies, independent of any fit (see series_noise)
    alias_axes = dec.alias_axes_for("auto", pixel_m, h[0])
    # (a periodic scan needs no window: its edges meet smoothly, and a roll then changes nothing)
    image_var, band_cells = band_noise_variance(src, aliased_axes=alias_axes, valid_fraction=okf.mean(axis=(1, 2)),
                                                taper=0.0 if edge == "periodic" else 1.0)
    height_noise = np.sqrt(image_var.reshape(nh, nb).mean(axis=1) / nb)  # of the bias-averaged image
    # edge band: the seam of a periodic fit and the reflection misfit fell to the interior level within
    # about (h_max - h_0) / pixel + 4 px on simulated and synthetic scans
    band = int(min(np.ceil((h[-1] - h[0]) / min(pixel_m)) + 4, min(rows, cols) // 4)) if edge != "window" else 0
    if edge == "reflect":
        # band-limited realignment of the reflected images (nothing wraps round), alternating with the fit and
        # Gauss-Newton drift steps
        fit, drift, aligned, valid = fit_with_drift_reflect(flat, okf, drift, heights_m=h, pixel_m=pixel_m, nb=nb,
                                                            interior_px=band, refine=register,
                                                            noise_std=height_noise, noise_dof=nb * band_cells,
                                                            weight_std=np.sqrt(shrunk_noise_variance(
                                                                height_noise**2, nb * band_cells)),
                                                            tol_px=5e-4, max_rounds=16)
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
    window_tol = 1e-4
    drift_cov = None
    if edge == "reflect" and register:
        drift_cov = drift_covariance(fit.model, fit.decay, 1.0 / image_var, np.repeat(np.arange(nh), nb), band)
    if edge == "window":
        # final fit on the raw images: drift in the model, the seam and wrapped borders never fitted
        fit = dec.fit_continuation_windowed(centred.reshape(nh * nb, rows, cols), heights_m=h, pixel_m=pixel_m,
                                            height_index=np.repeat(np.arange(nh), nb), drift_px=drift,
                                            valid=okf, noise_std=np.sqrt(image_var.reshape(nh, nb).mean(axis=1)),
                                            drift_tol_px=5e-4, tol=window_tol)
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

    # image means: the non-magnetic total is measured; only its split depends on the tip (mean_parts)
    mean_sd = np.sqrt(image_var.reshape(nh, nb)) / np.sqrt(n_ok)
    # the magnetic mean over the window stays in the total, with its typical size as model uncertainty: the
    # windowed fit's own estimate of it (its model's window mean) missed the true one by 0.03-0.24 deg on
    # 64 x 64 synthetic crops, more than that typical size, so it is not taken off
    total = means
    # (a periodic scan is one period of the film, whose mean is zero)
    mm_cov = np.zeros((nh, nh)) if edge == "periodic" else magnetic_window_mean_cov(fit.model)
    if grid:
        mf = split_bias_grid(total, mean_sd, mm_cov, bias_v=volts)
    else:
        try:
            mf = split_heights_only(total[:, 0], mean_sd[:, 0], mm_cov, heights_m=h, tip_radius_m=tip_radius_m,
                                    tip_radius_rel_std=tip_radius_rel_std, cone_half_angle_deg=cone_half_angle_deg,
                                    cone_height_m=cone_height_m, amplitude_m=amplitude_m, gap_offset_m=gap_offset_m,
                                    attractive_sign=1.0 if exact else -1.0, to_deg=to_deg,
                                    weight_std=np.sqrt(shrunk_noise_variance(image_var, band_cells) / n_ok[:, 0]))
        except ValueError as exc:
            raise SeriesInputError(str(exc)) from None
    es_deg = to_deg(mf.electrostatic)
    es_sd_deg = slope(mf.electrostatic) * mf.electrostatic_std
    sr_deg = to_deg(mf.short_range)
    sr_sd_deg = slope(mf.short_range) * mf.short_range_std
    parts_deg = {"nonmagnetic_mean_deg": to_deg(mf.total),
                 "nonmagnetic_mean_std_deg": slope(mf.total) * mf.total_std,
                 "nonmagnetic_mean_model_std_deg": slope(mf.total) * mf.total_model_std,
                 "electrostatic_mean_model_std_deg": slope(mf.electrostatic) * mf.electrostatic_model_std,
                 "short_range_mean_model_std_deg": slope(mf.short_range) * mf.short_range_model_std}

    # magnetic outputs in degrees: rms of the arctan-mapped denoised map, debiased by the fit noise
    mag_deg = to_deg(fit.model)
    mag_rms_sd = fit.magnetic_rms_std * lin
    if edge == "reflect":
        # over the interior, about its mean, as the fit's standard error is
        core = mag_deg[:, band:rows - band, band:cols - band]
        ms = np.var(core, axis=(-2, -1)) - fit.noise_power * lin**2
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
                            bandwidth_hz=bandwidth_hz,
                            amplitude_m=ASSUMED_AMPLITUDE_M if amplitude_m is None else amplitude_m)
    drift_sd = drift_mean_sd = None
    if drift_cov is not None:
        drift_sd = np.sqrt(np.clip(np.diagonal(drift_cov, axis1=1, axis2=2).T, 0.0, None))  # (J, 2)
        blocks = drift_cov.reshape(2, nh, nb, nh, nb)[:, np.arange(nh), :, np.arange(nh), :]  # (H, 2, nb, nb)
        drift_mean_sd = np.sqrt(np.clip(blocks.sum(axis=(-2, -1)) / nb**2, 0.0, None))
        drift_sd = drift_sd.reshape(nh, nb, 2) if grid else drift_sd
    params = {"reduced_chi2_mean": mf.reduced_chi2, "birge_ratio_mean": mf.birge_ratio,
              "tip_models": [c.to_dict() for c in mf.candidates], "assumed": dict(mf.assumed),
              "split_vs_amplitude": mf.amplitude_range}
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
        nan_pixels=int(bad.sum()), signal_space="gradient" if exact else "phase", fitted_parameters=params,
        drift_std_px=drift_sd, drift_mean_std_px=drift_mean_sd,
        cpd_model_std_v=mf.cpd_model_std_v, alias_axes=tuple(alias_axes), error_method=ERROR_METHOD[edge],
        **parts_deg)
