"""The cosine transform pair of the quantitative family against scipy.fft (the reference library).

``SpectralGrid`` takes its orthonormal DCT-II from numpy's FFT unless told to use scipy.fft; both paths must be
the same transform as ``scipy.fft.dctn`` / ``idctn`` with ``type=2, norm="ortho"``.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import fft as sp_fft

from assistant.analysis.quantitative.fourier import SpectralGrid


@pytest.mark.parametrize("shape", [(16, 16), (24, 37), (3, 64, 50)])
@pytest.mark.parametrize("scipy_fft", [False, True])
def test_cosine_pair_matches_scipy(shape, scipy_fft):
    a = np.random.default_rng(len(shape)).standard_normal(shape)
    grid = SpectralGrid(shape[-2:], 10e-9, periodic=False, scipy_fft=scipy_fft)
    want = sp_fft.dctn(a, type=2, norm="ortho", axes=(-2, -1))
    np.testing.assert_allclose(grid.forward(a), want, rtol=0, atol=1e-13)
    np.testing.assert_allclose(grid.inverse(a), sp_fft.idctn(a, type=2, norm="ortho", axes=(-2, -1)),
                               rtol=0, atol=1e-13)
    np.testing.assert_allclose(grid.inverse(grid.forward(a)), a, rtol=0, atol=1e-13)


def test_single_precision_stays_single_and_close():
    a = np.random.default_rng(5).standard_normal((4, 32, 48)).astype(np.float32)
    grid = SpectralGrid((32, 48), 10e-9, periodic=False)
    out = grid.inverse(a)
    assert out.dtype == np.float32 and out.flags.c_contiguous
    np.testing.assert_allclose(out, sp_fft.idctn(a.astype(float), type=2, norm="ortho", axes=(-2, -1)),
                               rtol=0, atol=2e-5)


def test_orthonormal_keeps_the_power():
    # Parseval for an orthonormal transform: sum |X|^2 = sum |x|^2
    a = np.random.default_rng(2).standard_normal((40, 30))
    spec = SpectralGrid(a.shape, 10e-9, periodic=False).forward(a)
    assert np.sum(spec**2) == pytest.approx(np.sum(a**2), rel=1e-12)
