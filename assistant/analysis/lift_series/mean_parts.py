"""The image-mean parts of a lift series: what is measured, what the tip model adds, and how sure each is.

A magnetic film large against the scan has almost no mean over it, so the mean of each image is the
non-magnetic signal, measured directly to the noise divided by the square root of the pixel count. The
magnetic contrast that does not average out over the window stays in it; its size is estimated from the
fitted magnetic spectrum at the lowest frequencies (a stationary field's window mean has about the power of
its lowest cosine cells) and reported as that total's model uncertainty.

Only the split of that total into the electrostatic part (``1/2 C''(z) (V - V_cpd)^2``; exact sphere series,
Smythe 1968, plus the Hudlet et al. 1998 cone, Eur. Phys. J. B 2, 5) and the short-range part (Hamaker sphere,
Hamaker 1937, Physica 4, 1058), both averaged over the oscillation (Giessibl 2001, Appl. Phys. Lett. 78, 123),
depends on the tip. From heights alone the split rests on the shapes of those curves, so it is fitted with
every plausible tip (cone or none, radius within its uncertainty, a stated gap offset within its uncertainty,
and where the file does not state them the amplitude and the gap offset over a range: :mod:`.tip_candidates`),
each fit holding both parts attractive, the fits are averaged with weights ``exp(-chi2 / (2 B^2))`` (equal
priors; the chi-square of each tip model against the measured means, tempered by the Birge ratio ``B`` of the
best one, so that where no model fits within noise the weights do not single one out), and the split's
uncertainty has three parts: the noise (propagated to first order through the whole procedure, so it is the
scatter the split shows over repeats with fresh noise), the Birge excess and the magnetic window mean (model
uncertainty), and the spread over the tip models (model uncertainty). Model averaging: Hoeting, Madigan,
Raftery & Volinsky 1999, Stat. Sci. 14, 382; Birge ratio: Birge 1932, Phys. Rev. 40, 207 (both from memory).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from assistant.analysis.cosine import dctn

from . import image_mean_models as lm
from .image_means import fit_mean_bias_grid, vertex_beyond_sentence
from .probe import ASSUMED_AMPLITUDE_M, TIP_RADIUS_REL_STD
from .tip_candidates import AMPLITUDE_RANGE_FACTOR, MIN_CLOSEST_APPROACH_M, TipCandidate, candidates, shapes

__all__ = ["TipCandidate", "MeanParts", "split_heights_only", "split_bias_grid", "magnetic_window_mean_cov",
           "ASSUMED_AMPLITUDE_M", "AMPLITUDE_RANGE_FACTOR", "TIP_RADIUS_REL_STD"]

SECANT_WIDTH = 1.5  # half-width of the secants that propagate the noise through the split [standard errors]


@dataclass(frozen=True)
class MeanParts:
    """Non-magnetic total and its split, in the caller's signal units (``*_std``: from the noise alone, the
    scatter over repeats with fresh noise; ``*_model_std``: from the model, i.e. the magnetic window mean, the
    Birge excess and the spread over tip models; combine them in quadrature for the whole uncertainty)."""

    total: np.ndarray
    total_std: np.ndarray
    total_model_std: np.ndarray
    electrostatic: np.ndarray
    electrostatic_std: np.ndarray
    electrostatic_model_std: np.ndarray
    short_range: np.ndarray
    short_range_std: np.ndarray
    short_range_model_std: np.ndarray
    correlation: np.ndarray
    reduced_chi2: float
    birge_ratio: float
    separable: bool
    sentence: str
    model_fit: np.ndarray | None = None   # the tip models' own prediction of the total, averaged (heights only)
    candidates: tuple = ()
    assumed: dict = field(default_factory=dict)
    amplitude_range: dict | None = None
    cpd_v: float | None = None
    cpd_std_v: float | None = None
    cpd_model_std_v: float | None = None
    cpd_sentence: str | None = None  # bias grid, V_cpd beyond the reach of the biases: why it is not determined


def _leakage(size: int) -> np.ndarray:
    """Mean of ``sinc^2(u)`` over the band ``u in [(k - 1/2) / 2, (k + 1/2) / 2]`` of every cosine cell k.

    ``sinc^2(f L)`` is how much of a field's power at frequency f leaks into its mean over a length L; cell k
    of the type-II DCT samples frequencies near ``k / (2 L)``.
    """
    u = (np.arange(size)[:, None] + np.linspace(-0.5, 0.5, 33)[None, :]) / 2.0
    return np.mean(np.sinc(np.abs(u)) ** 2, axis=1)


def magnetic_window_mean_cov(model: np.ndarray) -> np.ndarray:
    """Covariance of the magnetic mean over the window between all heights [signal units^2] (H, H).

    A stationary field's mean over a window of side L collects its power at frequency f with the weight
    ``sinc^2(f L)`` per axis; the fitted magnetic maps (H, rows, cols) give that power in their cosine cells.
    So the window mean's covariance is taken as the cells' products weighted by the leakage of their band
    (normalised over all cells but the mean itself), divided by the pixel count: it follows the field's
    spectral peak, which leaks into the mean through the window's side lobes, and its decay with height.
    On synthetic thin-film crops (30 patterns each, 64-256 px, 15-110 nm) the true window mean over the
    square root of the diagonal had an rms of 0.53-0.77 and at most 1.9, and the correlation between the
    lowest and the highest height was 0.87-0.90 against 0.83-0.90 found.
    """
    m = np.asarray(model, dtype=np.float32)
    nh, rows, cols = m.shape
    c = dctn(m).reshape(nh, -1).astype(np.float64)
    w = np.multiply.outer(_leakage(rows), _leakage(cols)).ravel()
    w[0] = 0.0
    w /= w.sum()
    return np.einsum("hq,jq,q->hj", c, c, w) / (rows * cols)


def _average(y, cinv, e, s, sign=1.0):
    """Model-averaged split of ``y`` (..., H) over M tip models (shapes ``e``, ``s`` (M, H)), generalised least
    squares with the inverse covariance ``cinv`` (H, H) of the means; any leading axes are separate data sets.
    Both parts attract (Hudlet et al. 1998; Hamaker 1937), so each model's two amplitudes are held to the sign
    ``sign`` of an attractive part (non-negative least squares, as :func:`.image_means.fit_mean_heights`):
    of the free fit, either part alone and neither, the one that keeps the signs with the least chi-square.

    Returns the electrostatic part (..., H), the spread over the models (..., H), chi2 (..., M), the weights
    (..., M) and the Birge factor ``B^2`` (...).
    """
    ce, cs = e @ cinv, s @ cinv
    cy = y @ cinv
    a11 = np.einsum("mh,mh->m", ce, e)
    a12 = np.einsum("mh,mh->m", ce, s)
    a22 = np.einsum("mh,mh->m", cs, s)
    r1 = cy @ e.T
    r2 = cy @ s.T
    det = a11 * a22 - a12**2
    zero = np.zeros_like(r1)
    options = [((a22 * r1 - a12 * r2) / det, (a11 * r2 - a12 * r1) / det), (r1 / a11, zero), (zero, r2 / a22),
               (zero, zero)]
    # chi-square up to the constant y' C^-1 y, which all options share
    costs = [np.where((sign * al >= 0) & (sign * be >= 0),
                      al * al * a11 + 2 * al * be * a12 + be * be * a22 - 2 * (al * r1 + be * r2), np.inf)
             for al, be in options]
    best = np.argmin(np.stack(costs), axis=0)
    alpha = np.choose(best, [o[0] for o in options])
    beta = np.choose(best, [o[1] for o in options])
    es_m = alpha[..., None] * e
    sr_m = beta[..., None] * s
    resid = y[..., None, :] - es_m - sr_m
    chi2 = np.einsum("...mh,hj,...mj->...m", resid, cinv, resid)
    dof = max(y.shape[-1] - 2, 1)
    low = chi2.min(axis=-1, keepdims=True)
    b2 = np.maximum(1.0, low / dof)
    wts = np.exp(-(chi2 - low) / (2.0 * b2))
    wts /= wts.sum(axis=-1, keepdims=True)
    # the measured total is kept: what the model leaves over is shared in proportion to the parts' sizes
    mag = np.abs(es_m) + np.abs(sr_m)
    share = np.where(mag > 0, np.abs(es_m) / np.where(mag > 0, mag, 1.0), 0.5)
    es_m = es_m + share * resid
    es = np.einsum("...m,...mh->...h", wts, es_m)
    spread = np.einsum("...m,...mh->...h", wts, (es_m - es[..., None, :]) ** 2)
    return es, spread, chi2, wts, b2[..., 0], y - np.einsum("...m,...mh->...h", wts, resid)


def split_heights_only(total, total_std, magnetic_mean_cov, *, heights_m, tip_radius_m: float,
                       tip_radius_rel_std: float = TIP_RADIUS_REL_STD, cone_half_angle_deg: float | None,
                       cone_height_m: float, amplitude_m: float | None, gap_offset_m: float | None,
                       gap_offset_std_m: float | None = None, attractive_sign: float = 1.0,
                       separation_tolerance: float = 0.2, to_deg=None, weight_std=None) -> MeanParts:
    """Split the measured non-magnetic total per height into electrostatic and short-range parts.

    Parameters
    ----------
    total, total_std : ndarray (H,)
        Measured non-magnetic mean per height and its standard error from the noise [s].
    magnetic_mean_cov : ndarray (H, H)
        Covariance of the magnetic window mean left in ``total`` (:func:`magnetic_window_mean_cov`) [s^2].
    heights_m : ndarray (H,)
        Lift heights [m].
    tip_radius_m, tip_radius_rel_std : float
        Nominal apex radius [m] and its relative uncertainty; the models use the radius and one standard
        deviation either side.
    cone_half_angle_deg : float or None
        Cone of the nominal tip; the models use a cone (this angle, 15 deg if None) and none.
    cone_height_m : float
        Cone height [m].
    amplitude_m, gap_offset_m : float or None
        Peak amplitude and gap offset [m] when known. None: :data:`ASSUMED_AMPLITUDE_M` and a factor
        :data:`AMPLITUDE_RANGE_FACTOR` either way; an offset between half the amplitude and the amplitude.
    gap_offset_std_m : float, optional
        Standard uncertainty of a stated ``gap_offset_m`` [m] (the setpoint rule's:
        :data:`.image_mean_models.FIRST_PASS_GAP_OFFSET_STD_M`); the models take the offset and offsets either
        side, so it enters the model uncertainty. None or 0: the offset is exact.
    attractive_sign : float
        Sign an attractive part has in the signal units (+1 force gradient, -1 phase).
    separation_tolerance : float
        The parts count as separable when at the lowest height each exceeds twice its whole uncertainty and
        that uncertainty is at most this fraction of the total.
    to_deg : callable, optional
        Signal units to degrees, for the sentence (default: identity).
    weight_std : ndarray (H,), optional
        Standard errors the fit weighs the means by, if not ``total_std`` (for example from noise estimates
        shrunk towards the series' common level: the window mean's covariance is much larger than the noise,
        so the fit leans on the noise of each height, and the 2-3 % scatter of its estimate moved the split
        by 15-20 % of its standard error on 64 x 64 crops).
    """
    y = np.asarray(total, float)
    sd = np.asarray(total_std, float)
    cmm = np.asarray(magnetic_mean_cov, float)
    mm = np.sqrt(np.clip(np.diag(cmm), 0.0, None))
    h = np.asarray(heights_m, float)
    deg = (lambda x: np.asarray(x, float)) if to_deg is None else to_deg
    every = candidates(radius_m=tip_radius_m, radius_rel_std=tip_radius_rel_std,
                       cone_half_angle_deg=cone_half_angle_deg, amplitude_m=amplitude_m, gap_offset_m=gap_offset_m,
                       gap_offset_std_m=gap_offset_std_m)
    cands, e, s, too_close = shapes(every, h, cone_height_m)
    if not cands:
        raise ValueError("no tip model keeps the tip off the surface at the lowest height")
    cov = np.diag(sd**2) + cmm
    cinv = np.linalg.inv(cov if weight_std is None else np.diag(np.asarray(weight_std, float) ** 2) + cmm)
    es, spread, chi2, wts, b2, model_fit = _average(y, cinv, e, s, attractive_sign)
    b2 = float(b2)
    # noise propagated through the whole procedure by central secants 1.5 standard errors wide (statistical
    # linearisation: the model weights bend on that scale). Scatter of the split over 300 draws of the means
    # against these errors (64-256 px crops): secants 1.5 wide 0.94-1.13, 1 wide 0.93-1.12 but 0.80-0.84 at the
    # top of a 256 x 256 crop in the whole analysis, derivatives (1e-3 wide) 0.85-1.10; a parametric bootstrap
    # (the procedure on redrawn means) came out 10-20 % below the scatter on 64 and 128 px crops
    nh = y.size
    jac = np.empty((nh, nh))
    for j in range(nh):
        step = np.zeros(nh)
        step[j] = SECANT_WIDTH * sd[j]
        up, down = (_average(y + d, cinv, e, s, attractive_sign)[0] for d in (step, -step))
        jac[:, j] = (up - down) / (2.0 * step[j])
    jsr = np.eye(nh) - jac
    es_sd = np.sqrt(np.clip(np.einsum("hj,j,hj->h", jac, sd**2, jac), 0.0, None))
    sr_sd = np.sqrt(np.clip(np.einsum("hj,j,hj->h", jsr, sd**2, jsr), 0.0, None))
    cov_es_sr = np.einsum("hj,j,hj->h", jac, sd**2, jsr)
    corr = cov_es_sr / np.where(es_sd * sr_sd > 0, es_sd * sr_sd, 1.0)
    es_tot2 = b2 * np.einsum("hj,jk,hk->h", jac, cov, jac) + spread
    sr_tot2 = b2 * np.einsum("hj,jk,hk->h", jsr, cov, jsr) + spread
    es_model = np.sqrt(np.clip(es_tot2 - es_sd**2, 0.0, None))
    sr_model = np.sqrt(np.clip(sr_tot2 - sr_sd**2, 0.0, None))
    sr = y - es
    dof = max(nh - 2, 1)
    red = float(chi2.min()) / dof
    fitted = tuple(TipCandidate(c.cone_half_angle_deg, c.radius_m, c.short_range_radius_m, c.amplitude_m,
                                c.gap_offset_m, float(x / dof), float(wt), c.hudlet_apex)
                   for c, x, wt in zip(cands, chi2, wts))

    # separability at the lowest height, everything included
    tot0 = abs(y[0])
    u_es, u_sr = np.sqrt(es_tot2[0]), np.sqrt(sr_tot2[0])
    worst = max(u_es, u_sr)
    # each part attractive beyond twice its uncertainty: a part of the wrong sign is never a separated part
    separable = bool(attractive_sign * es[0] > 2.0 * u_es and attractive_sign * sr[0] > 2.0 * u_sr
                     and worst <= separation_tolerance * tot0 and not too_close)
    h0 = h[0] * 1e9
    radii = sorted({c.radius_m for c in cands})
    geometry = (f"exact sphere or Hudlet apex, cone or none, apex and van der Waals radii each "
                f"{radii[0] * 1e9:.3g}-{radii[-1] * 1e9:.3g} nm")
    assumed, amp_range, extra = {}, None, []
    if amplitude_m is None:
        assumed["amplitude_nm"] = ASSUMED_AMPLITUDE_M * 1e9
        geometry += ", amplitude {:.3g}-{:.3g} nm".format(ASSUMED_AMPLITUDE_M / AMPLITUDE_RANGE_FACTOR * 1e9,
                                                          ASSUMED_AMPLITUDE_M * AMPLITUDE_RANGE_FACTOR * 1e9)
        amp_range = _amplitude_range(y, cinv, cands, e, s, deg, attractive_sign)
        lo, hi = amp_range["electrostatic_mean_deg"][0][0], amp_range["electrostatic_mean_deg"][1][0]
        extra.append(f"The oscillation amplitude was not given: {ASSUMED_AMPLITUDE_M * 1e9:.3g} nm was assumed; "
                     f"between {amp_range['amplitude_nm'][0]:.3g} and {amp_range['amplitude_nm'][1]:.3g} nm the "
                     f"electrostatic part at {h0:.4g} nm moves from {lo:.3g} to {hi:.3g} deg.")
    if gap_offset_m is None:
        gaps = sorted({c.gap_offset_m for c in cands})
        geometry += f", gap offset {gaps[0] * 1e9:.3g}-{gaps[-1] * 1e9:.3g} nm"
        left_out = len({(c.amplitude_m, c.gap_offset_m) for c in every}) - len(
            {(c.amplitude_m, c.gap_offset_m) for c in cands})
        assumed["gap_offset"], words_gap = _offset_words(fitted, h[0], tried=len(gaps), left_out=left_out)
        extra.append(words_gap)
    elif gap_offset_std_m:
        geometry += f", gap offset {gap_offset_m * 1e9:.3g} ± {gap_offset_std_m * 1e9:.2g} nm"
    # in degrees for the sentence
    es0, sr0, t0 = float(deg(es[0])), float(deg(sr[0])), float(deg(y[0]))
    fit_words = (f"The image-mean model fits the measured means within their uncertainty (noise and magnetic "
                 f"window mean; reduced chi-square {red:.3g})." if red <= 2.0 else
                 f"The image-mean model does not fit the measured means within their uncertainty (noise and "
                 f"magnetic window mean; reduced chi-square {red:.3g}): the split's uncertainties are widened by "
                 f"the Birge ratio {np.sqrt(b2):.3g}.")
    words = [f"The non-magnetic mean is measured ({t0:.4g} deg at {h0:.4g} nm); its split depends on the tip.",
             fit_words,
             f"Over plausible tip models ({geometry}) the split is averaged by goodness of fit and its spread "
             "counts as model uncertainty."]
    rel = worst / max(tot0, 1e-300)
    if separable:
        words.append(f"The heights separate the electrostatic and short-range parts: at {h0:.4g} nm "
                     f"{es0:.3g} and {sr0:.3g} deg, each known to within {rel:.1%} of the total, model uncertainty "
                     "included.")
    else:
        words.append(f"The heights alone cannot separate the electrostatic and short-range parts (not separable): "
                     f"at {h0:.4g} nm the split ({es0:.3g} and {sr0:.3g} deg) is uncertain by {rel:.0%} of the total, "
                     "model uncertainty included, so only their sum, the measured non-magnetic mean, is reliable. "
                     "Measure at three or more tip biases to separate them.")
    for name, part, u in (("electrostatic", es[0], u_es), ("short-range", sr[0], u_sr)):
        if attractive_sign * part < 0.0:
            words.append(f"The {name} part came out repulsive ({float(deg(part)):.3g} deg at {h0:.4g} nm), which it "
                         "cannot be" + (": the tip models do not describe these means." if attractive_sign * part
                                        < -2.0 * u else ", though within twice its uncertainty of zero."))
    if too_close:
        words.append(f"Every tip model brings the tip within {MIN_CLOSEST_APPROACH_M * 1e9:.3g} nm of the surface "
                     f"at {h0:.4g} nm, where the models no longer describe a tip: the split is not reliable.")
    words += extra
    return MeanParts(total=y, total_std=sd, total_model_std=mm, electrostatic=es, electrostatic_std=es_sd,
                     electrostatic_model_std=es_model, short_range=sr, short_range_std=sr_sd,
                     short_range_model_std=sr_model, correlation=corr, reduced_chi2=red, birge_ratio=float(np.sqrt(b2)),
                     separable=separable, sentence=" ".join(words), model_fit=model_fit, candidates=fitted,
                     assumed=assumed,
                     amplitude_range=amp_range)


def _offset_words(fitted, lowest_m: float, *, tried: int, left_out: int) -> tuple[str, str]:
    """The gap offset and closest approach of the tip models that carry the weight (weighted means), for the
    assumed values and the sentence."""
    w = np.array([c.weight for c in fitted])
    gap = float(w @ [c.gap_offset_m for c in fitted]) * 1e9
    close = float(w @ [c.closest_approach_m(lowest_m) for c in fitted]) * 1e9
    h0 = lowest_m * 1e9
    assumed = f"{gap:.3g} nm, the tip models' weighted mean (closest approach {close:.3g} nm at {h0:.4g} nm lift)"
    near = (f" ({left_out} more would bring the tip within {MIN_CLOSEST_APPROACH_M * 1e9:.3g} nm of the surface "
            f"and {'was' if left_out == 1 else 'were'} left out)" if left_out else "")
    words = (f"The gap offset was not given: {tried} offsets between half and all of the amplitude were tried{near}; "
             f"weighted by their fit they put it at {gap:.3g} nm, the closest approach at {close:.3g} nm at "
             f"{h0:.4g} nm lift, and their spread enters the split's uncertainty.")
    return assumed, words


def _amplitude_range(y, cinv, cands, e, s, deg, sign):
    """Split at the lowest and the highest amplitude of the range (averaged over the other tip parameters)."""
    amps = sorted({c.amplitude_m for c in cands})
    out = {"amplitude_nm": [amps[0] * 1e9, amps[-1] * 1e9], "electrostatic_mean_deg": [],
           "short_range_mean_deg": []}
    for amp in (amps[0], amps[-1]):
        sel = np.array([c.amplitude_m == amp for c in cands])
        es = _average(y, cinv, e[sel], s[sel], sign)[0]
        out["electrostatic_mean_deg"].append([float(v) for v in deg(es)])
        out["short_range_mean_deg"].append([float(v) for v in deg(y - es)])
    return out


def split_bias_grid(total, total_std, magnetic_mean_cov, *, bias_v, fit=None) -> MeanParts:
    """Split with a bias grid: per height a parabola in V with one common vertex V_cpd (Hudlet et al. 1998).

    The parabola separates the electrostatic part exactly; the remainder at V_cpd is the short-range part,
    and the magnetic window mean (the same at every bias) stays in it. Standard errors from the noise alone
    (the unscaled covariance); the Birge excess and the magnetic window mean are model uncertainty. ``fit``: the
    parabolas' fit of these means (:func:`.image_means.fit_mean_bias_grid`) if already made. Where V_cpd lies
    beyond the reach of the biases the fit reports none and calls the parts not separable; how far they move with
    the vertex (``fit.extrapolation``) joins their model uncertainty.
    """
    y = np.asarray(total, float)
    sd = np.asarray(total_std, float)
    mm = np.sqrt(np.clip(np.diag(np.asarray(magnetic_mean_cov, float)), 0.0, None))
    mf = fit if fit is not None else fit_mean_bias_grid(y, sd, bias_v=bias_v)
    scale = np.sqrt(max(mf.reduced_chi2, 1.0))
    # fit_mean_bias_grid scales its covariance by the Birge ratio where it exceeds one: undone for the noise
    es_sd = mf.electrostatic_std / scale
    sr_sd = mf.short_range_std / scale
    cpd_sd = None if mf.cpd_std_v is None else mf.cpd_std_v / scale
    birge_excess = np.sqrt(max(scale**2 - 1.0, 0.0))
    es_model = es_sd * birge_excess
    sr_model = np.sqrt((sr_sd * birge_excess) ** 2 + mm**2)
    note = None
    if mf.extrapolation is not None:  # the vertex beyond the biases: the split is an extrapolation
        es_model = np.hypot(es_model, mf.extrapolation[0])
        sr_model = np.hypot(sr_model, mf.extrapolation[1])
        note = vertex_beyond_sentence(mf.vertex_beyond_v, bias_v)
    sentence = mf.sentence
    if mf.reduced_chi2 > 2.0:
        sentence += (f" The parabolas do not fit the means within noise (reduced chi-square {mf.reduced_chi2:.3g}): "
                     f"the parts' uncertainties are widened by the Birge ratio {scale:.3g}.")
    return MeanParts(total=y, total_std=sd, total_model_std=np.broadcast_to(mm[:, None], y.shape).copy(),
                     electrostatic=mf.electrostatic, electrostatic_std=es_sd, electrostatic_model_std=es_model,
                     short_range=mf.short_range, short_range_std=sr_sd, short_range_model_std=sr_model,
                     correlation=mf.correlation, reduced_chi2=mf.reduced_chi2, birge_ratio=scale,
                     separable=mf.separable, sentence=sentence, cpd_v=mf.cpd_v, cpd_std_v=cpd_sd,
                     cpd_model_std_v=None if cpd_sd is None else cpd_sd * birge_excess, cpd_sentence=note)
