"""White noise of every image of a lift series, from its highest spatial frequencies, without any fit.

The noise of each height weighs the joint continuation fit and debiases its magnetic rms. Estimated from the
fit's own residual, it fed back into the weights of the next fit, and at the lowest height (whose finest
detail that height alone measures, so its residual says little about its noise) the loop had two stable
answers; which one a series ended on depended on the noise draw and on how many drift rounds ran. Taken
from the images themselves instead, the noise is a smooth function of the data, the same for every round.

Above the film the magnetic contrast at spatial frequency q decays as exp(-|q| z) (Laplace's equation; Hug et
al. 1998, J. Appl. Phys. 83, 5609; from memory), so at the highest frequencies of a scan with pixels not much
coarser than the lift height only the noise is left. Along an axis whose spacing is coarse against the lowest
height (see :func:`~.frequencies.alias_axes_for`), content above that axis's Nyquist
frequency aliases onto every frequency of it, so the band is then taken along the other axis alone.
"""

from __future__ import annotations

import numpy as np

from assistant.analysis.quantitative import tukey  # the Tukey window (Harris 1978), shared with the TTF fit

__all__ = ["fill_missing", "band_noise_variance", "shrunk_noise_variance"]


def fill_missing(images: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Images (n, rows, cols) with missing pixels filled by normalised convolution (Gaussian of 2 px;
    Knutsson & Westin 1993, Proc. IEEE CVPR, 515; from memory): smooth, so a hole adds no broadband power."""
    img = np.asarray(images, dtype=float)
    ok = np.asarray(valid, bool)
    if ok.all():
        return img
    from scipy import ndimage  # here: loading it costs 0.15 s, and most series miss no pixel

    num = ndimage.gaussian_filter(np.where(ok, img, 0.0), sigma=(0, 2, 2), mode="reflect")
    den = ndimage.gaussian_filter(ok.astype(float), sigma=(0, 2, 2), mode="reflect")
    return np.where(ok, img, num / np.maximum(den, 1e-12))


def band_noise_variance(images: np.ndarray, *, aliased_axes=(), band_fraction: float = 0.8,
                        valid_fraction=None, taper: float = 1.0) -> tuple[np.ndarray, float]:
    """Per-pixel white-noise variance of every image from the power in its highest-frequency band.

    The images are tapered (by default a Hann window, ``taper=1``) before the transform: a scan is not
    periodic, and the kinks where its opposite edges meet (which even the periodic component of the
    periodic-plus-smooth decomposition keeps) spread a strong low-frequency contrast over every frequency.
    On a 64 x 64 synthetic crop with 1.9 deg of magnetic contrast at the lowest height and no noise they read
    as 0.036 deg of noise with the periodic component, 0.005 deg with a Tukey window of half ramps and band
    0.7, 0.0013 deg with the Hann window and band 0.8 (which keeps a third of the cells' independent
    information). White noise keeps its spectrum, scaled by the mean square of the window, which is divided
    out.

    Parameters
    ----------
    images : ndarray (n, rows, cols)
        Mean-free images, missing pixels filled (:func:`fill_missing`).
    aliased_axes : sequence of {0, 1}
        Axes whose frequencies carry aliased signal; the band is taken along the others (all axes if both
        are aliased, the best that is left).
    band_fraction : float
        The band is ``|q| >= band_fraction * q_Nyquist`` (per axis normalised, taken radially).
    valid_fraction : array_like (n,), optional
        Fraction of measured pixels of every image: the filled ones carry no noise (Parseval).
    taper : float
        Fraction of each axis in the window's cosine ramps (0: no window).

    Returns
    -------
    variance : ndarray (n,)
        Noise variance per pixel [signal units squared].
    dof : float
        Effective number of independent complex cells behind each estimate: ``variance^2 / dof`` is the
        variance of the estimate for Gaussian noise (the band's cell count times the window's efficiency,
        ``(sum w^2)^2 / (n sum w^4)`` per axis, as neighbouring cells of a windowed transform are correlated).
    """
    img = np.asarray(images, dtype=float)
    rows, cols = img.shape[-2:]
    wr, wc = tukey(rows, taper), tukey(cols, taper)
    spectra = np.fft.rfft2(img * np.multiply.outer(wr, wc), axes=(-2, -1))
    gain = np.mean(wr**2) * np.mean(wc**2)
    efficiency = np.mean(wr**2) ** 2 / np.mean(wr**4) * np.mean(wc**2) ** 2 / np.mean(wc**4)
    qr = np.abs(np.fft.fftfreq(rows) * 2.0)[:, None]
    qc = (np.fft.rfftfreq(cols) * 2.0)[None, :]
    axes = set(int(a) for a in aliased_axes)
    if axes == {0}:
        rad = np.broadcast_to(qc, (rows, cols // 2 + 1))
    elif axes == {1}:
        rad = np.broadcast_to(qr, (rows, cols // 2 + 1))
    else:
        rad = np.hypot(qr, qc)
    band = rad >= band_fraction
    # cells of the half plane that are their own conjugate carry one real number, not two: left out
    band[0, 0] = False
    band[:, 0] &= np.fft.fftfreq(rows) > 0
    if cols % 2 == 0:
        band[:, -1] &= np.fft.fftfreq(rows) > 0
    if rows % 2 == 0:
        band[rows // 2, 0] = False
    cells = int(band.sum())
    if cells == 0:
        raise ValueError(f"band_fraction {band_fraction!r} leaves no frequencies")
    f = spectra[..., band]
    power = (f.real**2 + f.imag**2).mean(axis=-1) / (rows * cols * gain)
    if valid_fraction is not None:
        power = power / np.maximum(np.asarray(valid_fraction, float), 1e-3)
    return power, cells * efficiency


def shrunk_noise_variance(variance, dof) -> np.ndarray:
    """Noise variances of the heights shrunk towards their common level, for the weights of the joint fit.

    The detector noise of one series is usually alike at every height, and each estimate scatters by
    ``sqrt(1 / dof)`` of itself; weights that follow that scatter move the fit wherever the model misfits
    (near the edges of a small scan the reflection does), which on 64 x 64 crops made the top height's
    magnetic rms scatter 1.4 times its standard error. So every estimate is pulled towards the mean by the
    share the sampling scatter has in the spread between the heights (empirical Bayes, Efron & Morris 1975,
    J. Am. Stat. Assoc. 70, 311; from memory): alike heights get equal weights, a clearly noisier height keeps
    its own. A smooth function of the estimates.
    """
    v = np.asarray(variance, float)
    d = np.broadcast_to(np.asarray(dof, float), v.shape)
    mean = float(v.mean())
    rel = v / mean - 1.0
    sampling = float(np.mean(1.0 / d))
    between = max(float(np.mean(rel**2)) - sampling, 0.0)
    keep = between / (between + sampling)
    return mean * (1.0 + keep * rel)
