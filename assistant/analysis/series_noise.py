"""White noise of every image of a lift series, from its highest spatial frequencies, without any fit.

The noise of each height weighs the joint continuation fit and debiases its magnetic rms. Estimated from the
fit's own residual, it fed back into the weights of the next fit, and at the lowest height (whose finest
detail that height alone measures, so its residual says little about its noise) the loop had two stable
answers; which one a series ended on depended on the noise draw and on how many drift rounds ran. Taken
from the images themselves instead, the noise is a smooth function of the data, the same for every round.

Above the film the magnetic contrast at spatial frequency q decays as exp(-|q| z) (Laplace's equation; Hug et
al. 1998, J. Appl. Phys. 83, 5609; from memory), so at the highest frequencies of a scan with pixels not much
coarser than the lift height only the noise is left. Along an axis whose spacing is coarse against the lowest
height (see :func:`~assistant.analysis.decomposition.alias_axes_for`), content above that axis's Nyquist
frequency aliases onto every frequency of it, so the band is then taken along the other axis alone.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__ = ["fill_missing", "band_noise_variance"]


def fill_missing(images: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Images (n, rows, cols) with missing pixels filled by normalised convolution (Gaussian of 2 px;
    Knutsson & Westin 1993, Proc. IEEE CVPR, 515; from memory): smooth, so a hole adds no broadband power."""
    img = np.asarray(images, dtype=float)
    ok = np.asarray(valid, bool)
    if ok.all():
        return img
    num = ndimage.gaussian_filter(np.where(ok, img, 0.0), sigma=(0, 2, 2), mode="reflect")
    den = ndimage.gaussian_filter(ok.astype(float), sigma=(0, 2, 2), mode="reflect")
    return np.where(ok, img, num / np.maximum(den, 1e-12))


def band_noise_variance(spectra: np.ndarray, shape: tuple[int, int], *, aliased_axes=(),
                        band_fraction: float = 0.7, valid_fraction=None) -> tuple[np.ndarray, int]:
    """Per-pixel white-noise variance of every image from the power in its highest-frequency band.

    Parameters
    ----------
    spectra : ndarray, complex (n, rows, cols//2+1)
        ``numpy.fft.rfft2`` of the images (their periodic components, see
        :func:`~assistant.analysis.noise_floor.periodic_component_of`, so the seam of a non-periodic scan is
        not counted as noise).
    shape : (int, int)
        (rows, cols) of the images.
    aliased_axes : sequence of {0, 1}
        Axes whose frequencies carry aliased signal; the band is taken along the others (all axes if both
        are aliased, the best that is left).
    band_fraction : float
        The band is ``|q| >= band_fraction * q_Nyquist`` (per axis normalised, taken radially).
    valid_fraction : array_like (n,), optional
        Fraction of measured pixels of every image: the filled ones carry no noise (Parseval).

    Returns
    -------
    variance : ndarray (n,)
        Noise variance per pixel [signal units squared].
    cells : int
        Number of complex cells averaged; ``2 variance^2 / (2 cells)`` is the variance of the estimate for
        Gaussian noise (every cell's power is exponentially distributed).
    """
    rows, cols = shape
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
    f = np.asarray(spectra)[..., band]
    power = (f.real**2 + f.imag**2).mean(axis=-1) / (rows * cols)
    if valid_fraction is not None:
        power = power / np.maximum(np.asarray(valid_fraction, float), 1e-3)
    return power, cells
