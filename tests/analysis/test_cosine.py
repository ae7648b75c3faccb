"""``assistant.analysis.cosine`` against scipy.fft (the reference library): the same orthonormal type-II cosine
transform and inverse as ``scipy.fft.dctn`` / ``idctn`` with ``type=2, norm="ortho"``, over any axes, for even
and odd lengths down to one sample, in the input's precision."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import fft as sp_fft

from assistant.analysis.cosine import dctn, idctn


@pytest.mark.parametrize("shape,axes", [
    ((1, 1), (-2, -1)), ((2, 3), (-2, -1)), ((5, 7), (-2, -1)), ((8, 8), (-1,)), ((3, 16, 17), (-2, -1)),
    ((4, 1, 9), (-2, -1)), ((2, 64, 33), (-2,)), ((6, 10, 11), (0, -1)), ((9,), (0,)),
])
@pytest.mark.parametrize("dtype,atol", [(np.float64, 1e-13), (np.float32, 3e-6)])
def test_the_pair_is_scipys(shape, axes, dtype, atol):
    a = np.random.default_rng(sum(shape)).standard_normal(shape).astype(dtype)
    forward, inverse = dctn(a, axes), idctn(a, axes)
    want_f = sp_fft.dctn(a, type=2, axes=axes, norm="ortho")
    want_i = sp_fft.idctn(a, type=2, axes=axes, norm="ortho")
    assert forward.dtype == want_f.dtype == dtype and inverse.dtype == want_i.dtype == dtype
    assert forward.flags.c_contiguous and inverse.flags.c_contiguous
    np.testing.assert_allclose(forward, want_f, rtol=0, atol=atol)
    np.testing.assert_allclose(inverse, want_i, rtol=0, atol=atol)
    np.testing.assert_allclose(idctn(forward, axes), a, rtol=0, atol=atol)


def test_integers_are_transformed_in_double_precision():
    a = np.arange(24).reshape(4, 6)
    out = dctn(a)
    assert out.dtype == np.float64
    np.testing.assert_allclose(out, sp_fft.dctn(a.astype(float), type=2, norm="ortho"), rtol=0, atol=1e-12)
