"""The reference film: its stray field in Fourier space and its domain pattern from a measured image.

A film of thickness t magnetised perpendicular to its plane, +-Ms, uniform through the thickness, with the
pattern s(r) = +-1, has above its top surface, per 2-D wavevector (k = |k|; charge formulation, Hug et al.
1998, J. Appl. Phys. 83, 5609, from memory; the spacing and thickness losses of Wallace 1951, Bell Syst. Tech.
J. 30, 1145)::

    Hz(k, z) = (Ms / 2) (1 - exp(-k t)) exp(-k z) s(k),      k = 0 term zero.

z points away from the sample (z = 0 is the film's top surface). Pixel values of a pattern are read one of two
ways: ``"cell"`` — each pixel is a uniformly magnetised prism, so the field carries the prism's sinc factors
(the exact field of a piecewise-constant map, what magpylib computes for cuboids); ``"average"`` — each pixel
holds the cell average of a finer pattern (a pattern estimated from an image, walls placed inside pixels), and
the field of the finer pattern at the pixel centres is recovered by dividing the sinc of the cell average out.
"""

from __future__ import annotations

import math

import numpy as np

from assistant.analysis.quantitative.fourier import pixel_pair, wavenumbers
from assistant.errors import InputError

__all__ = ["film_factor", "film_field", "subpixel_sign", "PIXEL_MODELS", "EDGES"]

PIXEL_MODELS = ("average", "cell")
EDGES = ("periodic", "reflect", "zero")


def film_factor(k_per_m: np.ndarray, *, ms_a_per_m: float, thickness_m: float, height_m: float) -> np.ndarray:
    """``(Ms/2)(1 - exp(-k t)) exp(-k z)`` [A/m per unit of pattern]: the film's field per pattern component."""
    k = np.asarray(k_per_m, dtype=float)
    return 0.5 * ms_a_per_m * (-np.expm1(-k * thickness_m)) * np.exp(-k * height_m)


def _sinc_factor(shape: tuple[int, int], pixel_m) -> np.ndarray:
    dy, dx = pixel_pair(pixel_m)
    fy = np.fft.fftfreq(shape[0])[:, None]
    fx = np.fft.rfftfreq(shape[1])[None, :]
    return np.sinc(fy) * np.sinc(fx)  # frequencies in cycles per pixel


def film_field(pattern: np.ndarray, *, ms_a_per_m: float, thickness_m: float, height_m: float,
               pixel_m: float | tuple[float, float], pixel_model: str = "average", edge: str = "periodic",
               pad_px: int | None = None) -> np.ndarray:
    """Hz [A/m] at height ``height_m`` above the film's top surface, at the pixel centres of ``pattern``.

    Parameters
    ----------
    pattern : (rows, cols) magnetisation pattern in units of Ms (+-1 in domains, fractions in wall pixels).
    ms_a_per_m : saturation magnetisation Ms [A/m].
    thickness_m : film thickness t [m].
    height_m : observation height z above the top surface [m], >= 0.
    pixel_m : pixel spacing [m], one value or (row, column).
    pixel_model : ``"average"`` or ``"cell"`` (module docstring).
    edge : ``"periodic"`` (the map is one period of the film), ``"reflect"`` (a window onto a larger film: the
        map is extended by its mirror image, which keeps the field continuous at the edges) or ``"zero"``
        (an isolated patch in a non-magnetic plane).
    pad_px : width of the extension [pixels] for ``reflect``/``zero``; default: enough for the field to fall
        off (eight times the height plus thickness, at least 16 pixels).

    Notes
    -----
    The k = 0 component is zero: a uniformly magnetised film has no field outside it.
    """
    if pixel_model not in PIXEL_MODELS:
        raise InputError(f"pixel_model = {pixel_model!r} must be one of {', '.join(PIXEL_MODELS)}")
    if edge not in EDGES:
        raise InputError(f"edge = {edge!r} must be one of {', '.join(EDGES)}")
    for name, v in (("ms_a_per_m", ms_a_per_m), ("thickness_m", thickness_m)):
        if not (math.isfinite(v) and v > 0):
            raise InputError(f"{name} = {v!r} must be finite and > 0")
    if not (math.isfinite(height_m) and height_m >= 0):
        raise InputError(f"height_m = {height_m!r} must be finite and >= 0")
    s = np.asarray(pattern, dtype=float)
    dy, dx = pixel_pair(pixel_m)
    rows, cols = s.shape
    pad = 0
    if edge != "periodic":
        reach = 8.0 * (height_m + thickness_m)
        pad = int(pad_px) if pad_px is not None else max(16, int(math.ceil(reach / min(dy, dx))))
        pad = min(pad, rows - 1, cols - 1) if edge == "reflect" else pad
        s = np.pad(s, pad, mode="reflect" if edge == "reflect" else "constant")
    spec = np.fft.rfft2(s)
    _, _, k = wavenumbers(s.shape, (dy, dx))
    factor = film_factor(k, ms_a_per_m=ms_a_per_m, thickness_m=thickness_m, height_m=height_m)
    sinc = _sinc_factor(s.shape, (dy, dx))
    if pixel_model == "cell":
        factor = factor * sinc
    else:
        factor = factor / np.maximum(sinc, 0.3)  # |sinc| >= 0.405 below Nyquist; the floor is never reached
    factor[0, 0] = 0.0  # (1 - e^-kt) -> 0: a uniform sheet pair has no field outside (and for a patch, the
    # k = 0 term of the padded map carries no field either)
    field = np.fft.irfft2(spec * factor, s=s.shape)
    return field[pad:pad + rows, pad:pad + cols] if pad else field


def subpixel_sign(values: np.ndarray, pixel_m: float | tuple[float, float]) -> np.ndarray:
    """Cell average of sign(u) over each pixel, with the zero crossing placed inside the pixel.

    The zero level of the (smooth) map ``values`` is taken as locally straight: the signed distance of the
    pixel centre from it is d = u / |grad u| and the wall's normal is grad u / |grad u|. The fraction of the
    pixel on the positive side is then the distribution function, at d, of n_x X + n_y Y with X, Y uniform on
    the pixel (the convolution of two uniform densities: linear in the middle, quadratic near the corners).
    Returns 2 * fraction - 1, i.e. +-1 inside domains and a fraction in the pixels a wall crosses.
    """
    u = np.asarray(values, dtype=float)
    dy, dx = pixel_pair(pixel_m)
    gy, gx = np.gradient(u, dy, dx)
    g = np.hypot(gx, gy)
    tiny = g <= 1e-300
    g = np.where(tiny, 1.0, g)
    d = np.where(tiny, np.sign(u) * np.inf, u / g)
    a = np.abs(gx) / g * dx
    b = np.abs(gy) / g * dy
    a, b = np.maximum(a, b), np.minimum(a, b)   # a >= b: the longer projection of the pixel on the normal
    ad = np.abs(d)
    with np.errstate(invalid="ignore", divide="ignore"):
        linear = ad / np.where(a > 0, a, 1.0)
        corner = 0.5 - np.square(np.maximum(0.5 * (a + b) - ad, 0.0)) / np.where(b > 0, 2.0 * a * b, 1.0)
    half = np.where(ad <= 0.5 * (a - b), linear, np.where(ad < 0.5 * (a + b), corner, 0.5))
    half = np.clip(np.nan_to_num(half, nan=0.5, posinf=0.5), 0.0, 0.5)
    return np.sign(d) * 2.0 * half
