"""A contact potential that varies over the scan: its electrostatic contrast, and the mean it leaves at every bias.

With a bias grid each pixel sees ``a_h (V - V_x)^2`` (Hudlet et al. 1998, Eur. Phys. J. B 2, 5), where ``V_x``
is the contact potential under the tip at pixel x and ``a_h`` the curvature at height h. About the image mean,
and with ``a_h`` the same over the scan (a flat sample), that is

    a_h (V - V_x)^2 - <...> = (V - <V_x>) beta_h(x) + a_h [(V_x - <V_x>)^2 - var(V_x)],
    beta_h(x) = -2 a_h (V_x - <V_x>),

where ``beta_h`` is each pixel's slope in V across the biases (a straight line per pixel through the mean-free
images: the ``V^2`` term is the same at every pixel and left the images with their means; the magnetic and
short-range parts do not depend on the bias). This electrostatic contrast is not a stray field and does not decay
as one, so it is taken out of every image before the magnetic fit (:func:`lateral_contrast`): the first term
from each height's own slopes, the second from the contact-potential map that the slopes of the heights give
together (weighted by how well each height determines it, so the low heights, whose ``a_h`` is large, lead; the
heights are not registered for it, so a drift between them blurs that map by as much; a height whose slopes
disagree with the others' is left out, :func:`consistent_heights`). Each is taken out whole
where the slopes (of that height, or of the map) show more variance than their noise by five standard errors, and
not at all where they do not (:data:`DETECTION_Z`), so that slopes of noise alone take nothing out and put no noise
in, and a patch that is seen leaves no part of itself in the images. The map is kept
(``SeriesAnalysis.cpd_map_v``) and drawn in the report.

The image means keep ``a_h var(V_x)`` at every bias: a term that does not depend on the bias, which the parabola
fit of the means (:func:`.image_means.fit_mean_bias_grid`) leaves in the remainder, the short-range part.
:func:`add_lateral_cpd` measures it from the variance of the slopes, less what the noise adds
(``4 a_h^2 var(V_x)``), and moves it to the electrostatic part.

Assumed: ``a_h`` the same over the scan (topography would make it vary) and the images of one height in one frame
(its biases are consecutive passes over the same line). Only the variance between pixels is seen: a contact
potential that varies within the tip's footprint adds its own bias-independent term
(``sum a_i (V_i - V_x)^2`` over the footprint) that no single pixel shows, so the mean's term is a lower bound
when patches are finer than the tip.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

__all__ = ["LateralContrast", "consistent_heights", "seen", "lateral_contrast", "lateral_cpd_term", "with_lateral_cpd",
           "add_lateral_cpd", "contrast_by_bias", "bias_contrast_sentence"]


@dataclass(frozen=True)
class LateralContrast:
    """What :func:`lateral_contrast` found and took out (signal units)."""

    beta: np.ndarray            # (H, rows, cols) each pixel's slope in bias, from the images as given
    beta_noise_var: np.ndarray  # (H,) the noise variance of one pixel's slope
    contrast: np.ndarray        # (H * B, rows, cols) the electrostatic contrast taken out of every image
    added_var: np.ndarray       # (H,) the noise the removal adds to a height's bias-averaged image (per pixel)
    image_var_after: np.ndarray  # (H * B,) each image's own noise variance after the removal (per pixel)
    curvature: np.ndarray       # (H,) a_h of the image-mean parabolas
    cpd_v: float                # <V_x>, their common vertex [V]
    cpd_map_v: np.ndarray       # (rows, cols) the contact potential under the tip [V], in the images' frame
    cpd_map_std_v: float        # its noise per pixel [V]
    map_heights: np.ndarray     # (H,) bool: the heights the map comes from (see consistent_heights)


def _slopes(images, bias_v):
    volts = np.asarray(bias_v, float)
    dv = volts - volts.mean()
    u = dv / np.sum(dv**2)  # least-squares slope weights of each bias
    nb = volts.size
    x = np.asarray(images, float)
    return np.einsum("b,hbrc->hrc", u, x.reshape(x.shape[0] // nb, nb, *x.shape[1:])), u


DETECTION_Z = 5.0  # standard errors of a variance ratio above 1 for a pattern to count as seen (common practice)


def seen(variance_ratio, pixels: int) -> np.ndarray:
    """1.0 where a map's variance over its white noise's exceeds 1 by ``DETECTION_Z`` standard errors of that ratio
    (``sqrt(2 / pixels)`` for white noise alone), else 0.0."""
    return (np.asarray(variance_ratio, float) - 1.0 > DETECTION_Z * np.sqrt(2.0 / pixels)).astype(float)


MAP_AGREEMENT_LIMIT = 2.0  # a height's disagreement with the others' map at most its own noise (common practice)


def consistent_heights(beta, curvature, weight, *, limit: float = MAP_AGREEMENT_LIMIT) -> tuple[np.ndarray, float]:
    """The heights whose slopes agree on one contact-potential map, and the Birge ratio of those that do.

    Each height's slopes give a map of its own, ``-beta_h / 2 a_h``, with noise variance ``1 / weight_h`` per pixel.
    A height whose map differs from the map of the others by more than ``limit`` times the variance the noise of
    both explains (leave-one-out, the mean of the squares over the pixels) holds more than a contact potential: on
    the simulated stage at biases 1.9 V from V_cpd the lowest lift's slopes were mostly first-pass cross-talk
    (695 times), and the map from all heights was 400 mV off where its noise said 10 mV. The worst such height is
    left out and the test repeated while three or more remain (of two, neither can be blamed). The Birge ratio
    (Birge 1932, Phys. Rev. 40, 207) of the heights kept, ``sum_h w_h mean (y_h - map)^2 / (K - 1)``, at least 1,
    then scales the map's noise variance. Returns (used (H,) bool, ratio).
    """
    a = np.asarray(curvature, float)
    w = np.asarray(weight, float)
    used = (a != 0) & np.isfinite(w) & (w > 0)
    w = np.where(used, w, 1.0)  # (heights that cannot take part: no weight to divide by)
    y = -np.asarray(beta, float) / np.where(a != 0, 2.0 * a, np.inf)[:, None, None]
    y = y - y.mean(axis=(1, 2), keepdims=True)
    while used.sum() >= 3:
        total = float(w[used].sum())
        sum_y = np.einsum("h,hrc->rc", np.where(used, w, 0.0), y)
        rest = total - w  # the weight of the others
        r = (total * y - sum_y) / np.where(used, rest, 1.0)[:, None, None]  # y_h - the others' map
        chi2 = np.einsum("hrc,hrc->h", r, r) / r[0].size / (1.0 / w + 1.0 / np.where(used, rest, 1.0))
        worst = int(np.argmax(np.where(used, chi2, -np.inf)))
        if chi2[worst] <= limit:
            break
        used[worst] = False
    k = int(used.sum())
    if k < 2:
        return used, 1.0
    wu = np.where(used, w, 0.0)
    cpd = np.einsum("h,hrc->rc", wu, y) / wu.sum()
    scatter = float(np.einsum("h,hrc->", wu, (y - cpd[None]) ** 2)) / y[0].size / (k - 1)
    return used, max(scatter, 1.0)


def lateral_contrast(images, image_var, mean_fit, *, bias_v) -> LateralContrast:
    """The electrostatic contrast of a varying contact potential in every image (see above).

    Parameters
    ----------
    images : ndarray (H * B, rows, cols)
        Mean-free images, height-major (image ``i`` is height ``i // B``), holes filled.
    image_var : ndarray (H * B,)
        Noise variance of one pixel of every image.
    mean_fit : MeanFit
        The parabolas of the image means (:func:`.image_means.fit_mean_bias_grid`): ``a_h`` and ``<V_x>``.
    bias_v : array_like (B,)
    """
    volts = np.asarray(bias_v, float)
    nb = volts.size
    nh = np.shape(images)[0] // nb
    v0, a = float(mean_fit.parameters[0]), np.asarray(mean_fit.parameters[1:1 + nh], float)
    beta, u = _slopes(images, volts)
    sb2 = np.asarray(image_var, float).reshape(nh, nb) @ (u**2)
    # the contact-potential map (about its mean) from every height's slope, each weighted by 4 a_h^2 / var(slope),
    # over the heights that agree on it (a height whose slopes hold more than a contact potential is left out)
    w = 4.0 * a**2 / sb2
    used, birge = consistent_heights(beta, a, w)
    w_sum = max(float(w[used].sum()), 1e-300)
    d_var = birge / w_sum  # the map's noise variance per pixel [V^2]
    d = -np.einsum("h,hrc->rc", np.where(used, w, 0.0) / np.where(a != 0, 2.0 * a, np.inf), beta) / w_sum
    # a height left out keeps the map's contrast in place of its own slopes: its own are mostly something else
    # (first-pass cross-talk at a low lift far from V_cpd), which then stays in its images and is measured there
    # (contrast_by_bias); the map's noise is independent of that height's own
    own = used.astype(float)
    beta = np.where(used[:, None, None], beta, -2.0 * a[:, None, None] * d[None])
    sb2 = np.where(used, sb2, 4.0 * a**2 * d_var)
    # the slopes of each height, and the map, taken out where they show more than their noise (seen), else not:
    # where they hold noise alone (no patch, or a curvature too small to show one) nothing is taken out and no
    # noise put in (a vertex far from the biases, or a small curvature under the map's square, would multiply it);
    # a Wiener shrink by the share of the variance that is not noise left (1 - g) of a patch in the images, which a
    # bias far from V_cpd multiplies: on a 0.2 V patch 1.15-1.9 V from the biases the magnetic rms came out 2.3-5.8
    # standard errors low and the residual at 20 nm 2.75 x the noise (tests)
    g = seen(np.var(beta, axis=(1, 2)) / sb2, beta[0].size)
    g_d = float(seen(np.var(d) / d_var, d.size))
    d2 = g_d**2 * (d**2 - np.mean(d**2))
    linear = (volts[None, :, None, None] - v0) * (g[:, None, None] * beta)[:, None]
    contrast = (linear + a[:, None, None, None] * d2[None, None]).reshape(np.shape(images))
    # the noise after the removal. An image keeps its own noise n_b, less (V_b - V0) times the slope's noise
    # sum_c u_c n_c (which holds u_b n_b: the cross term, for the heights in the map), and the map's noise through
    # the second term (2 a_h d, at its rms); the bias average keeps the slope term at the mean bias (sum_b u_b = 0)
    iv = np.asarray(image_var, float).reshape(nh, nb)
    quad = 4.0 * a**2 * g_d**4 * float(np.mean(d**2)) * d_var
    dv0 = volts - v0
    after = (iv - 2.0 * (own * g)[:, None] * dv0[None] * u[None] * iv + (g**2 * sb2)[:, None] * dv0[None] ** 2
             + quad[:, None])
    mean_dv0 = float(volts.mean() - v0)
    added = g**2 * mean_dv0**2 * sb2 - 2.0 * own * g * mean_dv0 * (iv @ u) / nb + quad
    return LateralContrast(beta, sb2, contrast, added, after.ravel(), a, v0, v0 + d, float(np.sqrt(d_var)), used)


def lateral_cpd_term(beta, valid, beta_noise_var, *, curvature, curvature_std,
                     noise_dof: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """``a_h var(V_x)`` per height and its standard error from the noise (signal units).

    Parameters
    ----------
    beta : ndarray (H, rows, cols)
        Each pixel's slope in bias (:class:`LateralContrast`).
    valid : ndarray of bool (H, rows, cols)
        Pixels with data at every bias. The variance is over all of them, as the image means are (a patch in the
        middle has a larger variance over the interior alone).
    beta_noise_var : ndarray (H,)
        Noise variance of one pixel's slope.
    curvature, curvature_std : ndarray (H,)
        ``a_h`` of the image-mean parabolas and its standard error (signal units per V^2).
    noise_dof : float, optional
        Degrees of freedom of each image's noise estimate; its error is propagated through the noise correction.
    """
    ok = np.asarray(valid, bool)
    n = np.maximum(ok.sum(axis=(1, 2)), 2)
    mean = np.where(ok, beta, 0.0).sum(axis=(1, 2)) / n
    var_obs = np.where(ok, (beta - mean[:, None, None]) ** 2, 0.0).sum(axis=(1, 2)) / (n - 1)
    var_noise = np.asarray(beta_noise_var, float)
    excess = var_obs - var_noise
    a = np.asarray(curvature, float)
    a_safe = np.where(a != 0, a, np.inf)
    term = excess / (4.0 * a_safe)
    # the sample variance's own scatter (white noise about a fixed pattern), the noise level's estimate and the
    # curvature's error
    true_var = np.clip(excess, 0.0, None)
    sd_var = np.sqrt((2.0 * var_noise**2 + 4.0 * var_noise * true_var) / n)
    if noise_dof:
        sd_var = np.hypot(sd_var, var_noise * np.sqrt(2.0 / float(noise_dof)))
    term_sd = np.hypot(sd_var / (4.0 * np.abs(a_safe)), term * np.asarray(curvature_std, float) / np.abs(a_safe))
    return term, term_sd


def with_lateral_cpd(parts, term, term_sd):
    """:class:`.mean_parts.MeanParts` with the lateral term moved from the short-range part to the electrostatic
    part (at every bias); the term's standard error joins both parts' noise errors (it is the same error, with
    opposite signs, so their correlation falls)."""
    es = np.asarray(parts.electrostatic, float) + term[:, None]
    es_sd = np.hypot(parts.electrostatic_std, term_sd[:, None])
    sr_sd = np.hypot(parts.short_range_std, term_sd)
    cov = parts.correlation * parts.electrostatic_std[:, 0] * parts.short_range_std - term_sd**2
    corr = cov / np.where(es_sd[:, 0] * sr_sd > 0, es_sd[:, 0] * sr_sd, 1.0)
    return dataclasses.replace(parts, electrostatic=es, electrostatic_std=es_sd,
                               short_range=np.asarray(parts.short_range, float) - term, short_range_std=sr_sd,
                               correlation=corr)


def add_lateral_cpd(parts, lateral: LateralContrast, valid, *, bias_v, heights_m, noise_dof: float | None = None):
    """The bias-grid split ``parts`` with the lateral term measured from the slopes and moved (see above).

    ``a_h`` is that of the parabolas the contrast was found with (``lateral.curvature``), and its error that of
    the split's electrostatic part (noise and model) at the bias farthest from V_cpd, over ``(V_b - V_cpd)^2``.
    ``valid`` (H * B, rows, cols): where the images hold data."""
    volts = np.asarray(bias_v, float)
    d = (volts - lateral.cpd_v) ** 2  # the parabolas' vertex (also where V_cpd is not determined)
    a = lateral.curvature
    far = int(np.argmax(d))
    a_sd = np.hypot(parts.electrostatic_std[:, far], parts.electrostatic_model_std[:, far]) / d[far]
    ok = np.asarray(valid, bool).reshape(lateral.beta.shape[0], volts.size, *lateral.beta.shape[1:]).all(axis=1)
    term, term_sd = lateral_cpd_term(lateral.beta, ok, lateral.beta_noise_var, curvature=a, curvature_std=a_sd,
                                     noise_dof=noise_dof)
    moved = with_lateral_cpd(parts, term, term_sd)
    if np.abs(term[0]) > 2.0 * term_sd[0] and term[0] * a[0] > 0:  # seen at the lowest height
        rms_mv = 1e3 * np.sqrt(term[0] / a[0])
        moved = dataclasses.replace(moved, sentence=moved.sentence + (
            f" The contact potential varies over the scan ({rms_mv:.3g} mV rms at the lowest height): its "
            "electrostatic contrast was taken out of the images before the magnetic fit, and the part of the "
            "bias-independent mean that it leaves is electrostatic and is counted there."))
    left_out = ~np.asarray(lateral.map_heights, bool)
    if left_out.any():
        where = ", ".join(f"{x * 1e9:.4g}" for x in np.asarray(heights_m, float)[left_out])
        moved = dataclasses.replace(moved, sentence=moved.sentence + (
            f" The contact-potential map leaves out {where} nm: the bias slopes there disagree with the other "
            "heights' by more than their noise, so they hold more than a contact potential (cross-talk at a low "
            "lift far from V_cpd)."))
    return moved


def contrast_by_bias(images, image_var, *, bias_v) -> tuple[np.ndarray, np.ndarray]:
    """How much more of its height's bias-averaged contrast each bias's image holds (H, B; 0.02 = 2 % more), and
    the standard error of that from the noise.

    The magnetic contrast should not depend on the bias. A drive off the resonance makes it seem to, through the
    inversion of the phase; that is measured and taken out first (:mod:`.drive_offset`). A smaller part is left that
    still grows with (V - V_cpd)^2 at a low lift (about 0.7 % per V^2 at 10 nm on the simulated default film),
    mostly cross-talk through the first pass: the lift pass replays a recorded height that the magnetic force moved
    along the pattern, and the electrostatic gradient turns that height into contrast. A tip that switches the
    sample between passes also makes the passes differ. The decomposition models neither, so the difference is
    measured and reported. ``images`` (H * B, rows, cols), mean-free, the varying contact potential's contrast
    already out; ``image_var`` (H * B,) their noise per pixel."""
    nb = np.size(bias_v)
    x = np.asarray(images, float)
    nh = x.shape[0] // nb
    x = x.reshape(nh, nb, *x.shape[1:])
    avg = x.mean(axis=1)
    power = np.maximum(np.einsum("hrc,hrc->h", avg, avg), 1e-300)
    excess = np.einsum("hbrc,hrc->hb", x - avg[:, None], avg) / power[:, None]
    iv = np.asarray(image_var, float).reshape(nh, nb)
    diff_var = iv * (1.0 - 2.0 / nb) + iv.mean(axis=1, keepdims=True) / nb  # of one image less the average
    return excess, np.sqrt(diff_var / power[:, None])


def bias_contrast_sentence(excess, excess_std, heights_m, *, least: float = 0.01, significance: float = 5.0) -> str:
    """A sentence where the magnetic contrast differs between the biases by more than ``least`` (a share) and
    ``significance`` standard errors at some height; empty otherwise."""
    seen = (np.abs(excess) > least) & (np.abs(excess) > significance * excess_std)
    if not seen.any():
        return ""
    spread = np.ptp(excess, axis=1)
    i = int(np.argmax(np.where(seen.any(axis=1), spread, -np.inf)))
    where = ", ".join(f"{x * 1e9:.4g}" for x in np.asarray(heights_m)[seen.any(axis=1)])
    return (f" The magnetic contrast differs between the biases by up to {spread[i]:.1%} at "
            f"{heights_m[i] * 1e9:.4g} nm (beyond noise at {where} nm), which the decomposition assumes it does "
            "not; it grows with the distance of the bias from V_cpd at low lifts (keep the biases closer to V_cpd "
            "there), and a tip that switches the sample between passes changes it too (see the interaction regime).")
