"""Tip-sample interaction regime of a lift-height series: negligible, reversible or irreversible.

Takes the outputs of the decomposition (:func:`.decomposition.analyse_series`, which calls it) and says which of
the three regimes the trade distinguishes applies, with one sentence of evidence:

* **irreversible**: the repeat of the first height in each line differs from the first pass
  beyond noise (:mod:`.tip_change`): the tip rewrote the sample while it scanned. With a
  bias grid the noise is also taken from two passes at the top height that differ only in bias (their
  difference holds no magnetic contrast, and the electrostatic one is smooth): the decomposition's own
  estimate, from the highest spatial frequencies of the top image, reads magnetic content as noise when
  the lines are coarse (on 150 nm lines it read 1.0 deg for a true 0.05 deg and hid a change over 87 % of
  a low-coercivity film). At that finer noise each line's sub-pixel position error between the two passes is
  taken out first (a fitted shift along the line), or sharp contrast reads as a change.
* **reversible**: the repeat matches, but the images carry an attraction that does not follow the domain
  polarity. Two routes can show it:

  - *image mean* (needs a bias grid and k, Q): the bias-independent part of the image mean is attractive
    beyond what van der Waals can give at a Hamaker constant of ``hamaker_max_j`` (4e-19 J, the upper end of
    the handbook values for metals across air; Israelachvili 2011, from memory). A film's own stray field
    has no mean over an unbounded film (the k = 0 term of the charge formulation vanishes: Hug et al. 1998,
    J. Appl. Phys. 83, 5609, from memory), so a mean that grows on approach is either electrostatic (the bias
    grid removes it exactly), van der Waals (bounded) or a response of the film to the tip: a soft film's
    induced moment attracts the tip whatever the sign of the domains below (energy -mu0 chi/2 int |H_tip|^2,
    never positive; Jackson, Classical Electrodynamics, 3rd ed., sec. 5.16, from memory).
  - *lateral*: the continuation residual (what does not decay as exp(-|q| h) between heights) carries an
    attractive component proportional to the local magnitude of the magnetic contrast |m|, i.e. even in the
    domain polarity (for example domain walls that the tip pulls along).

  Either counts when it is significant and at least ``reversible_fraction`` of the magnetic contrast (rms)
  at some height.
* **negligible**: neither of the above; per height, the regime is negligible where the continuation
  residual is at noise and no polarity-even attraction above ``negligible_fraction`` of the magnetic
  contrast is seen there.

What the detection cannot see (also in DEVELOPERS.md):

* a reversible effect below the noise of the image mean or below ``negligible_fraction`` of the contrast;
* without a bias grid a uniform induced attraction is indistinguishable from electrostatics (both only
  change the image mean); without k and Q the van der Waals bound cannot be put in degrees. Then only the
  lateral route and the repeat remain, and the evidence says so;
* without a repeat pass an irreversible change is invisible; a change that the topography pass makes before
  every second pass of a line (the same for the first pass and its repeat) is invisible too;
* the window mean of the film's own field (scan smaller than its domains, or coarse line spacing aliasing
  the pattern onto the mean) stays in the image mean and can pose as a polarity-even attraction: on the
  simulated default film at 100 nm line spacing it reached 7 % of the magnetic contrast, hence the 25 %
  threshold for calling a series reversible (rule of thumb, no source).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from assistant.errors import InputError

from .image_mean_models import amplitude_weighted, centre_gap_m, vdw_sphere_gradient_n_per_m
from .noise_floor import white_noise_std
from .phase import phase_deg_from_gradient
from .probe import ProbeModel
from .recommend import Recommendation
from .tip_change import TipChange, finer_repeat_verdict

__all__ = ["REGIMES", "InteractionRegime", "bias_pair_noise_deg", "classify_interaction", "recommendation_with_regime"]

REGIMES = ("negligible", "reversible", "irreversible")
HAMAKER_MAX_J = 4e-19  # upper end of metal-air-metal Hamaker constants (Israelachvili 2011; from memory)


@dataclass(frozen=True)
class InteractionRegime:
    """Result of :func:`classify_interaction`.

    Attributes
    ----------
    regime : str
        "negligible", "reversible" or "irreversible".
    evidence : str
        One sentence with the numbers behind the verdict.
    heights_m : ndarray (H,)
    negligible_at : ndarray of bool (H,)
        Per height: residual at noise, no polarity-even attraction above ``negligible_fraction`` of the
        magnetic contrast, and no irreversible change in the series.
    lowest_negligible_m : float or None
        Lowest measured height where the regime is negligible.
    even_mean_deg, even_mean_std_deg : ndarray (H,)
        Attractive (positive) bias-independent image mean beyond the van der Waals bound [deg]; NaN where it
        cannot be formed (no bias grid, or no k and Q).
    even_lateral_deg, even_lateral_std_deg : ndarray (H,)
        Attractive (positive) amplitude (rms) of the residual component proportional to |magnetic contrast|
        [deg]; NaN where the image has no magnetic contrast to relate it to.
    residual_ratio : ndarray (H,)
        Interior residual rms over what the noise alone leaves.
    repeat_checked : bool
        A repeat pass was compared with the first.
    tip_change : TipChange or None
        The comparison of the repeat with the first pass that the verdict used.
    notes : tuple of str
        What could not be checked.
    """

    regime: str
    evidence: str
    heights_m: np.ndarray
    negligible_at: np.ndarray
    lowest_negligible_m: float | None
    even_mean_deg: np.ndarray
    even_mean_std_deg: np.ndarray
    even_lateral_deg: np.ndarray
    even_lateral_std_deg: np.ndarray
    residual_ratio: np.ndarray
    repeat_checked: bool
    tip_change: TipChange | None = None
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        """JSON keys added to the series analysis (``interaction_regime``, ``interaction_evidence``, ...)."""
        def lst(a):
            return [None if not np.isfinite(v) else float(v) for v in np.asarray(a, float)]

        low = self.lowest_negligible_m
        return {"interaction_regime": self.regime, "interaction_evidence": self.evidence,
                "interaction_negligible": [bool(x) for x in self.negligible_at],
                "negligible_from_nm": None if low is None else round(low * 1e9, 9),
                "even_attraction_mean_deg": lst(self.even_mean_deg),
                "even_attraction_lateral_deg": lst(self.even_lateral_deg),
                "interaction_notes": list(self.notes)}


def _vdw_bound_deg(heights_m, probe: ProbeModel, hamaker_max_j: float) -> np.ndarray:
    """Magnitude of the phase van der Waals could give at ``hamaker_max_j`` (full sphere-plane form,
    Hamaker 1937; oscillation-averaged, Giessibl 2001) [deg], positive."""
    amplitude = probe.amplitude_or_assumed_m
    dc = centre_gap_m(heights_m, amplitude_m=amplitude, gap_offset_m=probe.gap_offset_m)
    g = amplitude_weighted(lambda z: vdw_sphere_gradient_n_per_m(z, hamaker_j=hamaker_max_j,
                                                                 radius_m=probe.tip_radius_m),
                           dc, amplitude_m=amplitude)
    return -phase_deg_from_gradient(g, spring_constant_n_per_m=probe.spring_constant_n_per_m,
                                    quality_factor=probe.quality_factor)


def _lateral_even(magnetic_deg, residual_deg, noise_deg, band: int, attractive_sign: float):
    """Per height: the rms of the fitted magnetic image, and the attractive rms amplitude of the residual
    component along |m| - <|m|> with its standard error (least squares against [1, m, |m|], white noise of
    ``noise_deg`` per pixel). ``attractive_sign``: +1 where the residual is in force-gradient units (attractive
    positive), -1 where it is phase (attractive negative)."""
    nh = magnetic_deg.shape[0]
    amp = np.full(nh, np.nan)
    sd = np.full(nh, np.nan)
    contrast = np.full(nh, np.nan)
    rows, cols = magnetic_deg.shape[-2:]
    b = int(min(max(band, 0), min(rows, cols) // 4))
    core = (slice(b, rows - b), slice(b, cols - b))
    for i in range(nh):
        contrast[i] = np.nanstd(magnetic_deg[i][core])
        m = magnetic_deg[i][core].ravel()
        r = residual_deg[i][core].ravel()
        ok = np.isfinite(m) & np.isfinite(r)
        if ok.sum() < 16 or not np.any(m[ok]):
            continue
        m, r = m[ok], r[ok]
        design = np.column_stack([np.ones_like(m), m, np.abs(m)])
        q, tri = np.linalg.qr(design)
        if abs(tri[2, 2]) < 1e-12 * max(abs(tri[0, 0]), 1e-300):
            continue  # |m| is (nearly) a combination of 1 and m: no polarity-even direction to test
        coef = np.linalg.solve(tri, q.T @ r)
        # the even template orthogonalised against [1, m]: its norm sets the standard error
        spread = abs(tri[2, 2]) / np.sqrt(m.size)  # rms of that template
        amp[i] = attractive_sign * coef[2] * spread
        sd[i] = float(noise_deg[i]) / np.sqrt(m.size)
    return contrast, amp, sd


def bias_pair_noise_deg(stack: np.ndarray) -> float | None:
    """Per-pixel noise of one image from two passes at the top height that differ only in bias [deg]."""
    if stack.ndim != 4 or stack.shape[1] < 2:
        return None
    d = stack[-1, 0] - stack[-1, 1]
    ok = np.isfinite(d)
    if ok.mean() < 0.5:
        return None
    d = np.where(ok, d - np.median(d[ok]), 0.0)
    return white_noise_std(d) / np.sqrt(2.0)


def _repeat_verdict(a, phase_deg, repeat_phase_deg) -> TipChange | None:
    tip = a.tip_change
    if tip is None or tip.irreversible or phase_deg is None or repeat_phase_deg is None:
        return tip
    stack = np.asarray(phase_deg, float)
    pair = bias_pair_noise_deg(stack)
    rep = np.asarray(repeat_phase_deg, float)
    rep = rep[0] if rep.ndim == 3 else rep
    first = stack[0, 0] if stack.ndim == 4 else stack[0]
    return finer_repeat_verdict(first, rep, tip, pair)


def _ratio(x: float) -> str:
    """A ratio in two significant digits, never in e-notation (120, not 1.2e+02)."""
    return f"{x:.2g}" if abs(x) < 100 or not np.isfinite(x) else f"{x:.0f}"


def _power_of_ten(x: float) -> str:
    """``4 × 10⁻¹⁹`` for 4e-19: the way the project writes such numbers for people."""
    mantissa, exponent = f"{x:.1e}".split("e")
    sup = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")
    return f"{float(mantissa):g} × 10{str(int(exponent)).translate(sup)}"


def classify_interaction(analysis, phase_deg=None, *, repeat_phase_deg=None, probe: ProbeModel | None = None,
                         hamaker_max_j: float = HAMAKER_MAX_J, reversible_fraction: float = 0.25,
                         negligible_fraction: float = 0.1, significance: float = 5.0,
                         **probe_fields) -> InteractionRegime:
    """Name the tip-sample interaction regime of a decomposed lift-height series.

    Parameters
    ----------
    analysis : SeriesAnalysis
        The decomposition (its heights, magnetic and residual images, image-mean parts, residual check and
        tip-change result are used).
    phase_deg : ndarray, optional
        The stack the decomposition was given, (heights, rows, cols) or (heights, biases, rows, cols) [deg];
        with a bias grid and ``repeat_phase_deg`` it gives the independent noise for the repeat check.
    repeat_phase_deg : ndarray (rows, cols), optional
        The repeat of the first height (first bias).
    probe : ProbeModel, optional
        The probe as given to the decomposition: k [N/m] and Q put the van der Waals bound in degrees
        (image-mean route), with the tip apex radius, the peak oscillation amplitude and the oscillation
        centre above the surface at zero lift. In a notebook its fields may be given as keywords instead.
    hamaker_max_j : float
        Largest Hamaker constant taken as plausible [J].
    reversible_fraction : float
        A polarity-even attraction of at least this fraction of the magnetic contrast (rms) at some height
        makes the series reversible.
    negligible_fraction : float
        Per height, the regime is negligible only where the polarity-even attraction stays below this
        fraction (the same 10 % as the short-range rule of the recommendation; common practice, no source).
    significance : float
        Standard errors a polarity-even attraction must exceed to count.
    """
    if probe is not None and probe_fields:
        raise InputError(f"give the probe either as probe= or as keywords, not both ({sorted(probe_fields)})")
    probe = probe if probe is not None else ProbeModel(**probe_fields)
    a = analysis
    h = np.asarray(a.heights_m, float)
    nh = h.size
    notes: list[str] = []
    # the contrast the polarity-even parts are measured against: the rms of the fitted magnetic image (the
    # decomposition's noise-debiased rms reads 0 at a height the fit found far noisier than the rest)
    sign = 1.0 if a.signal_space == "gradient" else -1.0  # the residual image keeps the fit's own units
    mag, even_lat, even_lat_sd = _lateral_even(np.asarray(a.magnetic_deg, float), np.asarray(a.residual_deg, float),
                                               np.asarray(a.noise_deg, float), int(a.edge_band_px), sign)
    mag_safe = np.where(mag > 0, mag, np.nan)

    # image-mean route
    even_mean = np.full(nh, np.nan)
    even_mean_sd = np.full(nh, np.nan)
    bound = np.full(nh, np.nan)
    exact = probe.spring_constant_n_per_m is not None and probe.quality_factor is not None
    if a.bias_v is None:
        notes.append("no bias grid: a uniform tip-induced attraction cannot be told from the electrostatic part")
    elif a.cpd_v is None:  # the parabolas' vertex beyond the biases: their split is an extrapolation (image_means)
        notes.append("V_cpd beyond the reach of the biases: a uniform tip-induced attraction cannot be told from the "
                     "electrostatic part")
    elif not exact:
        notes.append("no k and Q: the van der Waals bound on the image mean cannot be put in degrees")
    else:
        bound = _vdw_bound_deg(h, probe, hamaker_max_j)
        even_mean = -np.asarray(a.short_range_mean_deg, float) - bound
        # judged against the noise and the error of the phase reference subtracted from every pass (an offset of
        # every image, which falls off with no height); the film's own window mean is left to the fraction rule
        even_mean_sd = np.hypot(np.asarray(a.short_range_mean_std_deg, float), probe.phase_reference_std_deg or 0.0)

    def flagged(value, sd, fraction):
        with np.errstate(invalid="ignore"):
            return np.nan_to_num((value > significance * sd) & (value >= fraction * mag_safe), nan=0.0).astype(bool)

    rev_mean = flagged(even_mean, even_mean_sd, reversible_fraction)
    rev_lat = flagged(even_lat, even_lat_sd, reversible_fraction)
    not_small = flagged(even_mean, even_mean_sd, negligible_fraction) | flagged(even_lat, even_lat_sd,
                                                                                negligible_fraction)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.asarray(a.residual_rms_interior_deg, float) / np.asarray(a.expected_residual_rms_deg, float)
    res_ok = np.asarray(a.residual_at_noise, bool)
    tip = _repeat_verdict(a, phase_deg, repeat_phase_deg)
    repeat_checked = tip is not None
    if not repeat_checked:
        notes.append("no repeat pass: an irreversible change could not be checked")
    irreversible = bool(repeat_checked and tip.irreversible)
    negligible_at = res_ok & ~not_small & (not irreversible)
    lowest = float(h[np.argmax(negligible_at)]) if negligible_at.any() else None

    if irreversible:
        regime = "irreversible"
        evidence = (f"Irreversible: the repeat of the {h[0] * 1e9:.4g} nm pass differs from the first pass beyond "
                    f"noise over {tip.changed_fraction:.1%} of the image (per-pixel noise {tip.noise_deg:.2g}°), "
                    "so the tip rewrote the sample during the series and no measured height is free of it.")
    elif rev_mean.any() or rev_lat.any():
        regime = "reversible"
        use_mean = rev_mean.any() and (not rev_lat.any() or np.nanmax(even_mean / mag_safe)
                                       >= np.nanmax(even_lat / mag_safe))
        value, sd, where = (even_mean, even_mean_sd, rev_mean) if use_mean else (even_lat, even_lat_sd, rev_lat)
        i = int(np.nanargmax(np.where(where, value / mag_safe, -np.inf)))
        top = nh - 1
        what = (f"the bias-independent image mean is attractive by {value[i]:.3g}° more than van der Waals "
                f"at {_power_of_ten(hamaker_max_j)} J allows ({bound[i]:.2g}°)" if use_mean else
                f"the continuation residual holds an attraction of {value[i]:.3g}° rms that follows the "
                "magnitude, not the sign, of the magnetic contrast")
        tail = (f", falling to {value[top]:.2g}° at {h[top] * 1e9:.4g} nm" if np.isfinite(value[top])
                and top != i else "")
        rep = "the repeat matches the first pass" if repeat_checked else "no repeat pass was made"
        evidence = (f"Reversible: at {h[i] * 1e9:.4g} nm {what}, {value[i] / mag[i]:.0%} of the magnetic contrast "
                    f"({value[i] / sd[i]:.0f} standard errors){tail}, while {rep}.")
    else:
        regime = "negligible"
        tested = np.concatenate([even_mean[np.isfinite(even_mean)] / mag_safe[np.isfinite(even_mean)],
                                 even_lat[np.isfinite(even_lat)] / mag_safe[np.isfinite(even_lat)]])
        tested = tested[np.isfinite(tested)]
        largest = f"largest {max(float(tested.max()), 0.0):.0%}" if tested.size else "none measurable"
        if res_ok.all():
            res = f"the continuation residual is at noise at every height (at most {_ratio(np.nanmax(ratio))} ×)"
        elif res_ok.any():
            good, bad = (", ".join(f"{x * 1e9:.4g}" for x in h[m]) for m in (res_ok, ~res_ok))
            res = (f"the continuation residual is at noise at {good} nm (above it at {bad} nm, "
                   f"{_ratio(np.nanmax(ratio[~res_ok]))} ×)")
        else:
            res = None
        rep = "the repeat matches the first pass" if repeat_checked else "no repeat pass was made"
        unseen = "; not checked: " + "; ".join(notes) if notes else ""
        seen = (f"no attraction independent of the domain polarity above {reversible_fraction:.0%} of the magnetic "
                f"contrast is seen ({largest})")
        if res is not None:
            evidence = f"Negligible: {res}, {seen}, and {rep}{unseen}."
        else:  # nothing points to an interaction, but no height is clean enough to confirm it absent
            evidence = (f"Negligible as far as it can be tested: {seen}, and {rep}{unseen}; but the continuation "
                        f"residual is above noise at every height (up to {_ratio(np.nanmax(ratio))} ×), so no "
                        "single height is confirmed free of it.")
    return InteractionRegime(regime, evidence, h, negligible_at, lowest, even_mean, even_mean_sd, even_lat,
                             even_lat_sd, ratio, repeat_checked, tip, tuple(notes))


def recommendation_with_regime(rec: Recommendation, regime: InteractionRegime) -> Recommendation:
    """The recommendation restricted to heights where the interaction regime is negligible.

    The lift height becomes the lowest measured height that meets the recommendation's own criteria and
    where the regime is negligible; the sentence names the lowest height where the regime is negligible.
    """
    crit = dict(rec.criteria)
    ok = np.asarray(regime.negligible_at, bool)
    crit["interaction_negligible"] = ok
    good = crit["short_range_ok"] & crit["residual_ok"] & crit["magnetic_ok"] & ok
    h = regime.heights_m
    lift = float(h[np.argmax(good)]) if good.any() else None
    low = regime.lowest_negligible_m
    if low is not None:
        tail = f" The tip-sample interaction is negligible from {low * 1e9:.4g} nm."
    elif regime.regime == "irreversible":
        tail = (" The tip rewrote the sample during this series: repeat it starting at a larger lift height "
                "(or with a tip of smaller moment) before trusting any height.")
    elif regime.regime == "negligible":  # neither verdict was found, but no height passes every test
        tail = (" No reversible or irreversible tip-sample interaction was found, but no measured height is "
                "confirmed free of it.")
    else:
        tail = f" The tip-sample interaction ({regime.regime}) is not negligible at any measured height."
    if lift == rec.lift_height_m:
        sentence = rec.sentence + tail
    elif lift is not None:
        res = rec.resolution_period_m[int(np.argmax(good))]
        per = f"; shortest resolved period there {res * 1e9:.3g} nm" if np.isfinite(res) else ""
        sentence = (f"Use a lift height of {lift * 1e9:.4g} nm: the lowest measured height where the short-range "
                    "part and the continuation residual meet the rules and the tip-sample interaction is "
                    f"negligible{per}." + tail)
    else:
        sentence = "No measured height qualifies." + tail
    if rec.bias_v is not None and lift != rec.lift_height_m:
        sentence += f" Set the tip bias to {rec.bias_v:.3g} V (V_cpd) to null the electrostatic part."
    return Recommendation(lift, rec.bias_v, crit, rec.resolution_period_m, sentence)
