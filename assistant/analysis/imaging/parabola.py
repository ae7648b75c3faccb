"""V_cpd from the parabola of the image mean over the tip biases, its error from the scatter of the line means.

The electrostatic force gradient is ``1/2 C''(z) (V - V_cpd)^2`` (Hudlet, Saint Jean, Guthmann & Berger 1998,
Eur. Phys. J. B 2, 5; the capacitance of a sphere over a plane after Smythe, Static and Dynamic Electricity), so
the image mean is a parabola in V whose vertex is V_cpd at every height: one common vertex, a curvature and an
offset per height. Everything one scan line shares across its biases (the magnetic contrast along that line, a
line offset of the first pass) cancels from the vertex. The scatter that does not cancel is measured: the line
means ``y[h, b, l]`` less their mean over the biases and less the image-mean profile leave the interaction
residual of a two-way layout (lines x biases, one value per cell), whose variance over ``H (L - 1)(B - 1)``
degrees of freedom is the per-line noise of one pass (Scheffe 1959, The Analysis of Variance, ch. 4; from
memory); the image means then carry ``sigma / sqrt(L)``. Minimising the squared line residuals with a free
offset per line gives the same vertex as the parabola of the image means.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..lift_series import fit_mean_bias_grid, plus_minus, vertex_beyond, vertex_beyond_sentence
from .errors import ImagingInputError

__all__ = ["BiasParabola", "fit_bias_parabola"]


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
    """Mean of every line of every image, (H, B, L), over the pixels valid at every bias of its height, and the
    lines that keep at least one such pixel (H, L). A pixel missing at one bias alone (beyond the phase limit far
    from V_cpd) would leave its magnetic contrast in that bias's line mean only, where it no longer cancels."""
    valid = np.broadcast_to(np.isfinite(stack).all(axis=1, keepdims=True), stack.shape)
    counts = valid.sum(axis=-1)
    means = np.where(valid, stack, 0.0).sum(axis=-1) / np.where(counts > 0, counts, 1)
    return means, (counts > 0).all(axis=1)


def fit_bias_parabola(stack, *, bias_v, attractive_sign: float = 1.0, min_significance: float = 3.0,
                      extra_vertex_std_v: float = 0.0, extra_source: str = "") -> BiasParabola:
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
    extra_vertex_std_v, extra_source : float, str
        A further standard error of the vertex [V] not in the line scatter (the drive's phase offset, which the
        signal was inverted with), added in quadrature, and what it comes from, for the sentence.

    Returns
    -------
    BiasParabola
        See the module docstring for the error model (Hudlet et al. 1998 for the parabola).
    """
    s = np.asarray(stack, float)
    volts = np.asarray(bias_v, float)
    if s.ndim != 4 or s.shape[1] != volts.size:
        raise ImagingInputError(f"stack must be (heights, biases={volts.size}, lines, pixels), got {s.shape}")
    if not np.all(np.isfinite(volts)):
        raise ImagingInputError(f"the tip biases must be finite numbers, got {volts.tolist()} V")
    if np.unique(volts).size < 3:
        raise ImagingInputError(f"V_cpd from the bias parabola needs at least 3 distinct biases, got "
                                f"{np.unique(volts).size}")
    nh, nb = s.shape[:2]
    y, ok = _line_means(s)
    n_lines = ok.sum(axis=1)  # per height
    if np.any(n_lines < 2):
        raise ImagingInputError(f"V_cpd needs at least two lines with data at every bias of a height; "
                                f"{', '.join(map(str, n_lines.tolist()))} line(s) have it (missing pixels and "
                                "pixels beyond the phase limit are left out)")
    y = np.where(ok[:, None, :], y, np.nan)
    mean = np.nanmean(y, axis=-1)  # (H, B)
    # interaction residual of lines x biases, per height
    r = y - np.nanmean(y, axis=1, keepdims=True) - (mean - mean.mean(axis=1, keepdims=True))[..., None]
    dof = int(((n_lines - 1) * (nb - 1)).sum())
    sigma = float(np.sqrt(np.nansum(r**2) / max(dof, 1)))
    if not sigma > 0.0:  # noiseless means: weights at the resolution of the numbers themselves
        sigma = float(np.finfo(float).eps * np.nanmax(np.abs(y))) or 1.0
    sd = np.repeat((sigma / np.sqrt(n_lines))[:, None], nb, axis=1)
    # the common vertex and the parabolas within the window; a vertex beyond it is looked for below, once the
    # curvature is known to be significant and attractive
    fit = fit_mean_bias_grid(mean, sd, bias_v=volts, look_beyond=False)
    vertex = float(fit.cpd_v)
    a = fit.parameters[1:1 + nh]
    c = fit.parameters[1 + nh:]
    # the errors come from the line scatter, measured on many degrees of freedom: the covariance is that of these
    # weights alone. Scaling it by the reduced chi-square of the few image means (H B - 2H - 1 degrees of freedom)
    # would inflate it at random (by 13 % on average at 5 biases); that is done only where the parabola clearly
    # misfits
    cov, chi2 = _covariance(mean, sd, volts, vertex, a, c)
    fit_dof = nh * nb - (2 * nh + 1)
    reduced = chi2 / max(fit_dof, 1)
    misfit = fit_dof > 0 and _chi2_sf(chi2, fit_dof) < 0.01
    if misfit:
        cov = cov * reduced
    a_sd = np.sqrt(np.diag(cov)[1:1 + nh])
    vertex_sd = float(np.hypot(np.sqrt(cov[0, 0]), extra_vertex_std_v))
    signed = attractive_sign * a
    significant = bool(np.all(np.isfinite(a_sd))) and bool(np.any(signed > min_significance * a_sd))
    beyond = vertex_beyond(mean, sd, volts, vertex) if significant else None
    if beyond is not None:
        cpd = cpd_sd = None
        sentence = vertex_beyond_sentence(beyond, volts)
    elif significant:
        cpd, cpd_sd = vertex, vertex_sd
        sentence = (f"V_cpd = {plus_minus(1e3 * cpd, 1e3 * cpd_sd)} mV from the parabola of the image mean over "
                    f"{nb} biases"
                    + (f" (common vertex at {nh} heights)" if nh > 1 else "") + "; error from the scatter of "
                    f"{int(n_lines.sum())} line means" + (f" and {extra_source}" if extra_source else "")
                    + (f", widened by the parabola's misfit (reduced chi-square {reduced:.3g})." if misfit
                       else "."))
    else:
        cpd = cpd_sd = None
        sentence = (f"The image mean does not vary with the tip bias beyond noise (curvature "
                    f"{np.max(signed / np.maximum(a_sd, 1e-300)):.2g} of its standard errors, fewer than "
                    f"{min_significance:g}, or of the wrong sign): V_cpd is not determined.")
    return BiasParabola(volts, mean, sd, a, a_sd, c, vertex, vertex_sd, cpd, cpd_sd, sigma, dof, float(reduced),
                        sentence)


def _covariance(mean, sd, volts, vertex, a, c) -> tuple[np.ndarray, float]:
    """Covariance of (V_cpd, a_1..a_H, c_1..c_H) from the Jacobian of ``a_h (V - V_cpd)^2 + c_h`` with weights
    ``1/sd^2`` (linearised least squares), and the chi-square of the image means."""
    nh, nb = mean.shape
    d = (volts - vertex) ** 2
    jac = np.zeros((nh, nb, 2 * nh + 1))
    jac[:, :, 0] = -2.0 * a[:, None] * (volts - vertex)[None]
    idx = np.arange(nh)
    jac[idx, :, 1 + idx] = d[None]
    jac[idx, :, 1 + nh + idx] = 1.0
    jw = (jac / sd[..., None]).reshape(nh * nb, -1)
    resid = (mean - a[:, None] * d[None] - c[:, None]) / sd
    return np.linalg.pinv(jw.T @ jw), float(np.sum(resid**2))


def _chi2_sf(x: float, dof: int) -> float:
    from scipy.stats import chi2  # loaded only when a parabola is fitted

    return float(chi2.sf(x, dof))
