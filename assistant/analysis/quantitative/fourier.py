"""Fourier-space helpers shared by the quantitative family: wavenumber grids, rings, windows, edge padding.

Conventions: arrays are (rows, columns) with a physical spacing ``pixel_m`` that is one number or a
(between rows, along a row) pair; transforms are ``numpy.fft.rfft2`` (unnormalised forward transform), so a
spectrum has shape (rows, columns // 2 + 1) and ``k`` is the magnitude of the 2-D angular wavevector [rad/m].
"""

from __future__ import annotations

import math

import numpy as np

from assistant.analysis.cosine import dctn, idctn
from assistant.errors import InputError

__all__ = ["SpectralGrid", "pixel_pair", "wavenumbers", "ring_edges", "ring_index", "tukey", "tukey_2d",
           "half_plane_weight"]


def pixel_pair(pixel_m: float | tuple[float, float]) -> tuple[float, float]:
    """``(row spacing, column spacing)`` [m] from one spacing or a pair; both finite and > 0."""
    pair = (pixel_m, pixel_m) if np.ndim(pixel_m) == 0 else tuple(pixel_m)
    if len(pair) != 2:
        raise InputError(f"pixel_m must be one spacing or a (row, column) pair, got {pixel_m!r}")
    dy, dx = float(pair[0]), float(pair[1])
    if not (math.isfinite(dy) and math.isfinite(dx) and dy > 0 and dx > 0):
        raise InputError(f"pixel_m = {pixel_m!r} must be finite and > 0 m")
    return dy, dx


def wavenumbers(shape: tuple[int, int], pixel_m: float | tuple[float, float]
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(ky, kx, k)`` [rad/m] on the rfft2 half plane of an image of ``shape``: ky a column, kx a row."""
    dy, dx = pixel_pair(pixel_m)
    ky = 2.0 * np.pi * np.fft.fftfreq(shape[0], d=dy)[:, None]
    kx = 2.0 * np.pi * np.fft.rfftfreq(shape[1], d=dx)[None, :]
    return ky, kx, np.hypot(ky, kx)


def ring_edges(shape: tuple[int, int], pixel_m: float | tuple[float, float]) -> tuple[float, int]:
    """Ring width [rad/m] (the coarser of the two frequency steps) and the number of rings up to Nyquist."""
    dy, dx = pixel_pair(pixel_m)
    dk = max(2.0 * np.pi / (shape[0] * dy), 2.0 * np.pi / (shape[1] * dx))
    k_nyquist = min(np.pi / dy, np.pi / dx)
    return dk, int(math.floor(k_nyquist / dk + 0.5)) + 1


def ring_index(k: np.ndarray, dk: float) -> np.ndarray:
    """Ring of every wavenumber: ring j holds (j - 1/2) dk <= k < (j + 1/2) dk (ring 0 is the mean)."""
    return np.floor(k / dk + 0.5).astype(np.intp)


def half_plane_weight(shape: tuple[int, int]) -> np.ndarray:
    """Weight of each rfft2 column in sums over the full plane: 2 for the columns that stand for a pair of
    conjugate components, 1 for the zero (and, with an even width, the Nyquist) column. Shape (1, cols//2 + 1)."""
    w = np.full(shape[1] // 2 + 1, 2.0)
    w[0] = 1.0
    if shape[1] % 2 == 0:
        w[-1] = 1.0
    return w[None, :]


def tukey(n: int, fraction: float) -> np.ndarray:
    """Tapered-cosine (Tukey) window of ``n`` points; ``fraction`` of the length is tapered (half at each end).

    fraction = 0 is the rectangular window, 1 the Hann window (Harris 1978, Proc. IEEE 66, 51; from memory).
    Written here because importing scipy.signal costs seconds.
    """
    if n < 1:
        raise InputError(f"window length {n} must be >= 1")
    if not 0.0 <= fraction <= 1.0:
        raise InputError(f"taper fraction {fraction!r} must be in [0, 1]")
    w = np.ones(n)
    taper = int(math.floor(fraction * (n - 1) / 2.0))
    if taper > 0:
        x = np.arange(taper) / (fraction * (n - 1) / 2.0)
        ramp = 0.5 * (1.0 - np.cos(np.pi * x))
        w[:taper] = ramp
        w[n - taper:] = ramp[::-1]
    return w


def tukey_2d(shape: tuple[int, int], fraction: float) -> np.ndarray:
    """Separable 2-D Tukey window (outer product of the row and column windows)."""
    return tukey(shape[0], fraction)[:, None] * tukey(shape[1], fraction)[None, :]


class SpectralGrid:
    """One transform pair over the last two axes: rfft2 for a periodic image, the orthonormal DCT-II otherwise (the
    FFT of the scan reflected at its edges, so nothing jumps where the edges meet; for an isotropic filter the
    product in this basis is the convolution of the reflected scan). Both carry |k|, the cell-average sinc and
    the weights that make sum(weight |X|^2) the full-plane power.

    ``scipy_fft``: take the cosine transforms from scipy.fft (2-3x faster each, but loading it costs 0.15-0.2 s
    in a process without scipy) instead of :mod:`assistant.analysis.cosine` (numpy's FFT); for callers that run
    many transforms and load scipy anyway. The two agree to 3e-15."""

    def __init__(self, shape: tuple[int, int], pixel_m: float | tuple[float, float], *, periodic: bool,
                 scipy_fft: bool = False) -> None:
        pixel = pixel_pair(pixel_m)
        self.shape, self.periodic, self.scipy_fft = tuple(shape), periodic, scipy_fft
        if periodic:
            _, _, self.k = wavenumbers(shape, pixel)
            self.sinc = np.sinc(np.fft.fftfreq(shape[0]))[:, None] * np.sinc(np.fft.rfftfreq(shape[1]))[None, :]
            self.weight = half_plane_weight(shape)
            self.norm = float(np.prod(shape))       # noise power per component = sigma^2 * N
        else:
            ky = np.pi * np.arange(shape[0])[:, None] / (shape[0] * pixel[0])
            kx = np.pi * np.arange(shape[1])[None, :] / (shape[1] * pixel[1])
            self.k = np.hypot(ky, kx)
            self.sinc = np.sinc(np.arange(shape[0]) / (2.0 * shape[0]))[:, None] * \
                np.sinc(np.arange(shape[1]) / (2.0 * shape[1]))[None, :]
            self.weight = np.ones((1, 1))
            self.norm = 1.0                          # orthonormal: noise power per component = sigma^2

    def noise_power(self, spectrum: np.ndarray, k_nyquist: float) -> float:
        """Per-component noise power from the components above 0.8 k_Nyquist (robust: their median, divided by
        the median of the power's distribution: ln 2 for complex Fourier, 0.4549 for real cosine coefficients)."""
        outer = self.k > 0.8 * k_nyquist
        if np.count_nonzero(outer) < 8:
            raise InputError("the image is too small to estimate its noise (fewer than 8 components above 0.8 "
                             "of the Nyquist frequency)")
        return float(np.median(np.abs(spectrum[outer]) ** 2) / (math.log(2.0) if self.periodic else 0.45494))

    def forward(self, a: np.ndarray) -> np.ndarray:
        if self.periodic:
            return np.fft.rfft2(a)
        if self.scipy_fft:
            from scipy.fft import dctn as scipy_dctn
            return scipy_dctn(a, type=2, norm="ortho", axes=(-2, -1))
        return dctn(a)

    def inverse(self, spec: np.ndarray) -> np.ndarray:
        if self.periodic:
            return np.fft.irfft2(spec, s=self.shape)
        if self.scipy_fft:
            from scipy.fft import idctn as scipy_idctn
            return scipy_idctn(spec, type=2, norm="ortho", axes=(-2, -1))
        return idctn(spec)
