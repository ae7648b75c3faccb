"""The part of the electrostatic image mean that a laterally varying contact potential leaves at every bias.

With a bias grid each pixel sees ``a_h (V - V_x)^2`` (Hudlet et al. 1998, Eur. Phys. J. B 2, 5), where ``V_x``
is the contact potential under the tip at pixel x and ``a_h`` the curvature at height h. Its mean over the image
is ``a_h (V - <V_x>)^2 + a_h var(V_x)``: a parabola with the mean contact potential as its vertex, plus a term
that does not depend on the bias. The parabola fit of the image means (:func:`.image_means.fit_mean_bias_grid`)
takes the first for the electrostatic part and leaves the second in the remainder, the short-range part.

The second is measured per pixel. Every image here has its mean removed, so a uniform ``a_h`` drops the ``V^2``
term and leaves, at each pixel, a slope in V of ``beta(x) = -2 a_h (V_x - <V_x>)`` (the magnetic and short-range
parts do not depend on the bias). A straight line per pixel across the biases gives ``beta``; its variance over
the image, less the part the noise adds (known from the noise of every image), is ``4 a_h^2 var(V_x)``, so the
term is ``(var(beta) - var_noise) / (4 a_h)``, with the sign of the electrostatic part.

Assumed: ``a_h`` the same over the scan (a flat sample; topography would make it vary) and the images of one
height registered to each other (the drift fit does this). Only the variance between pixels is seen: a contact
potential that varies within the tip's footprint adds its own bias-independent term (``sum a_i (V_i - V_x)^2``
over the footprint) that no single pixel shows, so the term is a lower bound when patches are finer than the tip.
"""

from __future__ import annotations

import dataclasses

import numpy as np

__all__ = ["lateral_cpd_term", "with_lateral_cpd", "add_lateral_cpd"]


def lateral_cpd_term(aligned, valid, image_var, *, bias_v, curvature, curvature_std,
                     noise_dof: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """``a_h var(V_x)`` per height and its standard error from the noise (signal units).

    Parameters
    ----------
    aligned, valid : ndarray (H * B, rows, cols)
        Registered, mean-free images, height-major (image ``i`` is height ``i // B``), and where they hold data.
    image_var : ndarray (H * B,)
        Noise variance of one pixel of every image (white: the band-limited alignment keeps it so).
    bias_v : array_like (B,)
        Tip biases [V], at least two distinct values.
    curvature, curvature_std : ndarray (H,)
        ``a_h`` of the image-mean parabolas and its standard error (signal units per V^2).
    noise_dof : float, optional
        Degrees of freedom of each image's noise estimate; its error is propagated through the noise correction.
    """
    volts = np.asarray(bias_v, float)
    nb = volts.size
    x = np.asarray(aligned, float)
    nimg, rows, cols = x.shape
    nh = nimg // nb
    # over every valid pixel, as the image means are (a patch in the middle has a larger variance in the interior)
    y = x.reshape(nh, nb, rows, cols)
    ok = np.asarray(valid, bool).reshape(nh, nb, rows, cols).all(axis=1)  # (H, r, c): every bias there
    dv = volts - volts.mean()
    u = dv / np.sum(dv**2)                                   # least-squares slope weights of each bias
    beta = np.einsum("b,hbrc->hrc", u, y)
    n = np.maximum(ok.sum(axis=(1, 2)), 2)
    mean = np.where(ok, beta, 0.0).sum(axis=(1, 2)) / n
    var_obs = np.where(ok, (beta - mean[:, None, None]) ** 2, 0.0).sum(axis=(1, 2)) / (n - 1)
    var_noise = np.asarray(image_var, float).reshape(nh, nb) @ (u**2)
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


def add_lateral_cpd(parts, aligned, valid, image_var, *, bias_v, noise_dof: float | None = None):
    """The bias-grid split ``parts`` with the lateral term measured from the images and moved (see above).

    ``a_h`` comes from the split's own parabolas: ``electrostatic[h, b] = a_h (V_b - V_cpd)^2``, and its error
    from the electrostatic part's (noise and model) at the bias farthest from V_cpd."""
    d = (np.asarray(bias_v, float) - parts.cpd_v) ** 2
    es = np.asarray(parts.electrostatic, float)
    a = es @ d / np.sum(d**2)
    far = int(np.argmax(d))
    a_sd = np.hypot(parts.electrostatic_std[:, far], parts.electrostatic_model_std[:, far]) / d[far]
    term, term_sd = lateral_cpd_term(aligned, valid, image_var, bias_v=bias_v, curvature=a, curvature_std=a_sd,
                                     noise_dof=noise_dof)
    moved = with_lateral_cpd(parts, term, term_sd)
    if np.abs(term[0]) > 2.0 * term_sd[0] and term[0] * a[0] > 0:  # seen at the lowest height
        rms_mv = 1e3 * np.sqrt(term[0] / a[0])
        moved = dataclasses.replace(moved, sentence=moved.sentence + (
            f" The contact potential varies over the scan ({rms_mv:.3g} mV rms at the lowest height); the part of "
            "the bias-independent mean that this leaves is electrostatic and is counted there."))
    return moved
