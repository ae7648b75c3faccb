"""Streaming Welch accumulator against scipy.signal.welch (the reference implementation)."""

import tracemalloc

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from assistant.analysis.calibration.spectra import SpectrumError, WelchAccumulator, welch_variance_inflation


def _reference(x, rate_hz, nperseg, detrend="constant"):
    # scipy.signal.welch defaults: 50 % overlap, periodic Hann, one-sided density, complete segments only.
    return scipy.signal.welch(x, rate_hz, window="hann", nperseg=nperseg, noverlap=nperseg // 2,
                              detrend=detrend, scaling="density")


@settings(max_examples=60, deadline=None)
@given(
    n_samples=st.integers(64, 6000),
    log2_seg=st.integers(4, 9),
    cuts=st.lists(st.floats(0, 1), max_size=12),
    detrend=st.booleans(),
    seed=st.integers(0, 2**32 - 1),
)
def test_equals_scipy_welch_for_any_chunking(n_samples, log2_seg, cuts, detrend, seed):
    seg = 2**log2_seg
    if seg > n_samples:
        seg = 16
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n_samples) * 3.0 + 0.7 + np.sin(np.arange(n_samples) * 0.3)
    bounds = sorted({int(c * n_samples) for c in cuts} | {0, n_samples})
    acc = WelchAccumulator(2.5e5, seg, detrend=detrend)
    for a, b in zip(bounds[:-1], bounds[1:]):
        acc.add(x[a:b])  # chunk boundaries fall anywhere, also inside segments
    res = acc.result()
    f_ref, p_ref = _reference(x, 2.5e5, seg, detrend="constant" if detrend else False)
    np.testing.assert_allclose(res.frequencies_hz, f_ref, rtol=0, atol=1e-9)
    np.testing.assert_allclose(res.psd_v2_per_hz, p_ref, rtol=1e-12, atol=0)
    assert res.n_segments == (n_samples - seg) // (seg // 2) + 1
    assert acc.n_samples == n_samples


def test_chunk_sizes_one_and_odd():
    rng = np.random.default_rng(7)
    x = rng.standard_normal(1000)
    acc = WelchAccumulator(1e3, 64)
    for v in x[:100]:
        acc.add(np.array([v]))  # one sample at a time
    acc.add(x[100:101])
    acc.add(np.array([]))
    acc.add(x[101:])
    np.testing.assert_allclose(acc.result().psd_v2_per_hz, _reference(x, 1e3, 64)[1], rtol=1e-12)


def test_float32_record_matches_double_reference():
    rng = np.random.default_rng(3)
    x32 = rng.standard_normal(50_000).astype(np.float32)
    acc = WelchAccumulator(1e6, 1024)
    for i in range(0, x32.size, 7777):
        acc.add(x32[i:i + 7777])
    np.testing.assert_allclose(acc.result().psd_v2_per_hz, _reference(x32.astype(np.float64), 1e6, 1024)[1],
                               rtol=1e-12)


def test_white_noise_normalisation():
    # One-sided density of unit-variance white noise is 2 sigma^2 / fs; its integral is the variance
    # (Parseval; the check value 2.000e-6 V^2/Hz at 1 MHz is computed with scipy.signal.welch).
    rng = np.random.default_rng(11)
    x = rng.standard_normal(2**20)
    acc = WelchAccumulator(1e6, 4096)
    acc.add(x)
    res = acc.result()
    assert np.mean(res.psd_v2_per_hz[1:-1]) == pytest.approx(2e-6, rel=5e-3)
    assert np.sum(res.psd_v2_per_hz) * res.resolution_hz == pytest.approx(1.0, rel=5e-3)


def test_variance_inflation_hann_half_overlap():
    w = scipy.signal.get_window("hann", 1024)
    # Closed forms for the periodic Hann window: N sum w^4 / (sum w^2)^2 = 35/18 and, for segments offset by
    # half a window, 1/12 (derived in the module docstring from Parseval).
    assert welch_variance_inflation(w, 1, 512) == pytest.approx(35 / 18, rel=1e-9)
    assert welch_variance_inflation(w, 10, 512) == pytest.approx(35 / 18 + 2 * 0.9 / 12, rel=1e-9)
    assert welch_variance_inflation(np.ones(64), 5, 64) == pytest.approx(1.0)


def test_variance_inflation_matches_monte_carlo():
    # The mean over M bins of P/S for white noise has variance inflation / (K M) if the factor is right.
    rng = np.random.default_rng(5)
    seg, k_seg = 256, 9
    means = []
    for _ in range(400):
        acc = WelchAccumulator(1.0, seg)
        acc.add(rng.standard_normal(seg // 2 * (k_seg + 1)))
        res = acc.result()
        means.append(np.mean(res.psd_v2_per_hz[10:-10] / 2.0))
    res_k, m = res.n_segments, seg // 2 + 1 - 20
    predicted = res.variance_inflation / (res_k * m)
    measured = np.var(means, ddof=1)
    # 400 samples: the variance estimate has a relative SD of sqrt(2/399) = 7 %.
    assert measured == pytest.approx(predicted, rel=0.25)


def test_constant_memory():
    x = np.random.default_rng(1).standard_normal(2**22)  # 32 MiB
    acc = WelchAccumulator(1e6, 2**14)
    tracemalloc.start()
    acc.add(x)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak < 12 * 2**20, f"peak {peak / 2**20:.1f} MiB"
    assert acc._buf.size < 2**21


@pytest.mark.parametrize("bad", [np.array([0.0, np.nan, 1.0] * 20), np.array([np.inf] * 40)])
def test_non_finite_samples_rejected(bad):
    acc = WelchAccumulator(1e3, 16)
    with pytest.raises(SpectrumError, match="finite"):
        acc.add(bad)


def test_argument_errors():
    with pytest.raises(SpectrumError, match="segment_length"):
        WelchAccumulator(1e3, 15)
    with pytest.raises(SpectrumError, match="rate_hz"):
        WelchAccumulator(-1.0, 64)
    acc = WelchAccumulator(1e3, 64)
    with pytest.raises(SpectrumError, match="1-D"):
        acc.add(np.zeros((4, 4)))
    with pytest.raises(SpectrumError, match="real"):
        acc.add(np.zeros(8, complex))
    acc.add(np.zeros(10))
    with pytest.raises(SpectrumError, match="too short"):
        acc.result()
    assert issubclass(SpectrumError, ValueError)
