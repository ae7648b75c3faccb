"""Exactly sampled thermal oscillator: spectrum, variance and chunking.

Reference: the one-sided displacement PSD of a damped harmonic oscillator in a heat bath (fluctuation-
dissipation theorem; textbook), S_z(f) = (2 kB T / (pi k f0 Q)) / [(1 - (f/f0)^2)^2 + (f/(f0 Q))^2], whose
integral is kB T / k. Sampling at rate fs folds it: the exact discrete process has the aliased spectrum
sum_n S_z(|f + n fs|) at any time step (Norrelykke & Flyvbjerg 2011, Phys. Rev. E 83, 041103).
"""

import math

import numpy as np
import pytest
from scipy.signal import welch

from simulated_stage.thermal_mode import ThermalMode

KB = 1.380649e-23
K, F0, Q, T = 2.8, 75e3, 200.0, 300.0


def s_z(f, k=K, f0=F0, q=Q, t=T):
    return (2 * KB * t / (math.pi * k * f0 * q)) / ((1 - (f / f0) ** 2) ** 2 + (f / (f0 * q)) ** 2)


def aliased(f, fs, n=200):
    return sum(s_z(np.abs(f + m * fs)) for m in range(-n, n + 1))


def record(fs, seconds, seed=1, white=0.0, chunk=1 << 18):
    mode = ThermalMode(stiffness_n_per_m=K, resonance_hz=F0, quality_factor=Q, temperature_k=T, rate_hz=fs,
                       rng=np.random.default_rng(seed), white_noise_std_m=white)
    return np.concatenate(list(mode.record(int(seconds * fs), chunk=chunk)))


def band_ratios(x, fs, bands, model):
    nperseg = int(fs / 40)  # 40 Hz bins: about 9 per FWHM (f0/Q = 375 Hz)
    f, p = welch(x, fs, window="hann", nperseg=nperseg, scaling="density")
    segments = 2 * len(x) // nperseg - 1
    out = []
    for lo, hi in bands:
        sel = (f > lo) & (f < hi)
        ratio = p[sel] / model(f[sel])
        # bins of a Hann-windowed, 50 %-overlapped Welch estimate are correlated; 2/sqrt(bins*segments) is a
        # conservative one-sigma bound (Welch 1967; Harris 1978)
        out.append((ratio.mean(), 2.0 / math.sqrt(sel.sum() * segments)))
    return out


@pytest.mark.parametrize("fs, bands", [
    (2e6, [(2e3, 40e3), (60e3, 72e3), (74e3, 76e3), (78e3, 95e3), (200e3, 600e3)]),   # fine step
    (200e3, [(2e3, 40e3), (60e3, 72e3), (74e3, 76e3), (78e3, 95e3)]),                 # coarse: dt = 0.375/f0
])
def test_sampled_spectrum_equals_aliased_continuous(fs, bands):
    x = record(fs, 2.0)
    for (lo, hi), (ratio, sigma) in zip(bands, band_ratios(x, fs, bands, lambda f: aliased(f, fs))):
        assert abs(ratio - 1) < 4 * sigma, f"band {lo:g}-{hi:g} Hz: ratio {ratio:.4f} +- {sigma:.4f}"


def test_coarse_step_differs_from_unaliased_formula_far_from_peak():
    # Negative control: at fs = 200 kHz the image of the upper flank (105-115 kHz) folds onto 85-98 kHz, so
    # the bare continuous formula is wrong there while the aliased one holds (previous test).
    fs = 200e3
    x = record(fs, 2.0)
    (ratio, sigma), = band_ratios(x, fs, [(85e3, 98e3)], s_z)
    assert ratio - 1 > 0.15 and ratio - 1 > 20 * sigma


def test_variance_is_kt_over_k():
    x = record(250e3, 20.0, seed=3)
    # relative SD of a mean square over T seconds: sqrt(Q / (pi f0 T)) = 0.65 % here
    assert x.var() / (KB * T / K) == pytest.approx(1.0, abs=3 * math.sqrt(Q / (math.pi * F0 * 20.0)))


def test_start_is_stationary():
    first = np.array([ThermalMode(stiffness_n_per_m=K, resonance_hz=F0, quality_factor=Q, temperature_k=T,
                                  rate_hz=2e6, rng=np.random.default_rng(s)).next_chunk(1)[0]
                      for s in range(3000)])
    # variance of 3000 independent Gaussian draws: relative SD sqrt(2/3000) = 2.6 %
    assert first.var() / (KB * T / K) == pytest.approx(1.0, abs=0.11)


def test_chunks_continue_exactly():
    a = record(2e6, 0.05, seed=7, chunk=1 << 20)
    b = record(2e6, 0.05, seed=7, chunk=997)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12 * a.std())


def test_white_noise_is_folded_in_exactly():
    fs, white = 2e6, 2e-12
    x = record(fs, 2.0, white=white)
    bands = [(2e3, 40e3), (74e3, 76e3), (300e3, 900e3)]
    model = lambda f: aliased(f, fs) + 2 * white**2 / fs  # one-sided density of white noise: 2 sigma^2 / fs
    for (lo, hi), (ratio, sigma) in zip(bands, band_ratios(x, fs, bands, model)):
        assert abs(ratio - 1) < 4 * sigma, f"band {lo:g}-{hi:g} Hz: ratio {ratio:.4f} +- {sigma:.4f}"


def test_invalid_parameters():
    with pytest.raises(ValueError, match="quality_factor"):
        ThermalMode(stiffness_n_per_m=K, resonance_hz=F0, quality_factor=0.3, temperature_k=T, rate_hz=1e6,
                    rng=np.random.default_rng(0))
    with pytest.raises(ValueError, match="rate_hz"):
        ThermalMode(stiffness_n_per_m=K, resonance_hz=F0, quality_factor=Q, temperature_k=T, rate_hz=0.0,
                    rng=np.random.default_rng(0))


def test_fine_step_branch_agrees_with_closed_form():
    # Below h = 0.02 the noise covariance comes from Van Loan's block exponential; both must agree with
    # scipy.linalg.expm of the oscillator matrix (the definition of the exact discretisation).
    from scipy.linalg import expm

    from simulated_stage.thermal_mode import _state_noise

    a = np.array([[0.0, 1.0], [-1.0, -1.0 / Q]])
    for h in (0.005, 0.019, 0.021, 0.5):
        m, sig = _state_noise(Q, h)
        np.testing.assert_allclose(m, expm(a * h), atol=1e-14)
        np.testing.assert_allclose(sig, np.eye(2) - m @ m.T, rtol=1e-9, atol=1e-15)
