"""The orthonormal type-II cosine transform and its inverse over chosen axes, on numpy's FFT alone.

The same transform as ``scipy.fft.dctn`` / ``idctn`` with ``type=2, norm="ortho"`` (checked against them in
``tests/analysis/test_cosine.py``). Written here because loading scipy.fft costs 0.15-0.2 s of a command's start,
more than the transforms of a lift-height series analysis take.

Each axis goes through one real FFT of its own length (Makhoul 1980, IEEE Trans. ASSP 28, 27; from memory): the
even samples in order followed by the odd ones reversed, ``v = (x_0, x_2, ..., x_3, x_1)``, has the DFT ``V`` with
``y_k = 2 sum_n x_n cos(pi k (2n + 1) / 2N) = 2 Re(exp(-i pi k / 2N) V_k)``. ``v`` is real, so ``V_{N-k}`` is the
conjugate of ``V_k``, and with ``Z_k = exp(-i pi k / 2N) V_k`` on the half spectrum ``k = 0 .. N//2`` every output
is at hand: ``y_k = 2 Re Z_k`` and ``y_{N-k} = -2 Im Z_k``. The inverse runs it backwards:
``Z_k = (y_k - i y_{N-k}) / 2`` (with ``y_N = 0``), then ``irfft`` and the samples put back in order.
Orthonormal scale: ``sqrt(1 / 2N)``, and ``sqrt(1 / 4N)`` for ``k = 0``. A real input keeps its precision (float32
in, float32 out), as with scipy.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["dctn", "idctn"]


def _order(n: int) -> np.ndarray:
    """Positions of ``v``: the even samples in order, then the odd ones reversed."""
    return np.concatenate([np.arange(0, n, 2), np.arange(n - 1 - n % 2, 0, -2)])


def _twiddle(n: int, axis: int, ndim: int, dtype) -> np.ndarray:
    """``exp(-i pi k / 2N)`` times the orthonormal scale, ``k = 0 .. N//2``, shaped to broadcast along ``axis``."""
    k = np.arange(n // 2 + 1)
    w = np.exp(-0.5j * np.pi * k / n) * math.sqrt(2.0 / n)
    w[0] *= math.sqrt(0.5)
    shape = [1] * ndim
    shape[axis] = -1
    return w.astype(dtype).reshape(shape)


def _part(ndim: int, axis: int, part: slice) -> tuple:
    return tuple(part if i == axis else slice(None) for i in range(ndim))


def _dct_axis(a: np.ndarray, axis: int) -> np.ndarray:
    n, m = a.shape[axis], a.shape[axis] // 2 + 1
    z = np.fft.rfft(np.take(a, _order(n), axis=axis), axis=axis)
    z *= _twiddle(n, axis, a.ndim, z.dtype)
    out = np.empty(a.shape, dtype=a.dtype)
    out[_part(a.ndim, axis, slice(0, m))] = z.real
    if n > m:  # y_{N-j} = -2 Im Z_j for j = N - m .. 1, that is k = m .. N - 1
        out[_part(a.ndim, axis, slice(m, n))] = np.negative(np.take(z.imag, np.arange(n - m, 0, -1), axis=axis))
    return out


def _idct_axis(x: np.ndarray, axis: int) -> np.ndarray:
    n, m = x.shape[axis], x.shape[axis] // 2 + 1
    z = np.take(x, np.arange(m), axis=axis).astype(np.result_type(x.dtype, np.complex64))
    if m > 1:
        z.imag[_part(x.ndim, axis, slice(1, m))] = np.negative(np.take(x, n - np.arange(1, m), axis=axis))
    z /= _twiddle(n, axis, x.ndim, z.dtype)
    return np.take(np.fft.irfft(z, n=n, axis=axis), np.argsort(_order(n)), axis=axis)


def _each_axis(a, axes, one) -> np.ndarray:
    out = np.asarray(a)
    if out.dtype not in (np.float32, np.float64):
        out = out.astype(np.float64)
    for axis in axes:
        out = one(out, axis % out.ndim)
    return out


def dctn(a, axes=(-2, -1)) -> np.ndarray:
    """Orthonormal type-II cosine transform over ``axes`` (``scipy.fft.dctn(a, type=2, norm="ortho")``)."""
    return _each_axis(a, axes, _dct_axis)


def idctn(c, axes=(-2, -1)) -> np.ndarray:
    """Inverse of :func:`dctn` over ``axes`` (``scipy.fft.idctn(c, type=2, norm="ortho")``)."""
    return _each_axis(c, axes, _idct_axis)
