"""Thermal-noise calibration against published formulas, check values and synthetic records.

Synthetic truth is built here from the one-sided oscillator spectrum (fluctuation-dissipation for
m z'' + gamma z' + k z = F, e.g. Hutter & Bechhoefer 1993, Rev. Sci. Instrum. 64, 1868) plus a white and a
1/f background, independently of the simulated stage: either as periodogram values S(f) times
Gamma(n, 1/n) noise (the distribution of a mean of n periodograms, Norrelykke & Flyvbjerg 2010,
Rev. Sci. Instrum. 81, 075103), or as a time series from white Gaussian noise shaped in the frequency domain.
"""

import numpy as np
import pytest
import scipy.integrate
import scipy.optimize

from assistant.analysis.constants import BOLTZMANN_J_PER_K as KB
from assistant.analysis.calibration import (
    DETECTION_FACTORS, ThermalFitError, analyse_thermal_record, calibrate_thermal,
    fit_thermal_spectrum, invols_from_thermal, oscillator_psd, spring_constant_from_thermal,
)

BETA_OL = 0.817434  # Butt & Jaschke 1995, Nanotechnology 6, 1 (optical lever, static InvOLS)
BETA_D = 0.970688  # same, displacement detection


def true_psd(f, f0, q, a0, white, one_over_f):
    u = f / f0
    s = a0 / ((1 - u**2) ** 2 + (u / q) ** 2) + white
    return s + np.divide(one_over_f, f, out=np.zeros_like(f), where=f > 0)


def a0_for(k, invols, temperature, f0, q, beta=BETA_OL):
    """A0 [V^2/Hz] such that equipartition with the Butt-Jaschke factor gives k (inverse of the method)."""
    v2 = beta * KB * temperature / (k * invols**2)
    return 2 * v2 / (np.pi * q * f0)


def gamma_periodogram(f, s, n, rng):
    return s * rng.gamma(n, 1.0 / n, size=f.size)


def shaped_series(n, fs, psd_fn, rng):
    """Gaussian series of length n whose expected one-sided periodogram is psd_fn(f)."""
    f = np.fft.rfftfreq(n, 1 / fs)
    s = psd_fn(f)
    s[0] = 0.0
    x = np.sqrt(s * n * fs / 4) * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size))
    x[-1] = x[-1].real * np.sqrt(2)
    return np.fft.irfft(x, n)


K_TRUE, T_TRUE, INVOLS, F0, Q = 2.8, 298.15, 50e-9, 75e3, 200.0
A0 = a0_for(K_TRUE, INVOLS, T_TRUE, F0, Q)
PEAK = A0 * Q * Q


# --- published formulas and check values ---------------------------------------------------------------

def test_peak_area_formula_by_quadrature():
    # <V1^2> = A0 pi Q f0 / 2: integral of the oscillator term over 0..inf (derived; verified numerically).
    def g(f):
        return oscillator_psd(np.array([f]), f0_hz=F0, q=Q, a0_v2_per_hz=1.0)[0]
    near = scipy.integrate.quad(g, 0, 2 * F0, points=[F0], limit=400, epsrel=1e-12)[0]
    tail = scipy.integrate.quad(g, 2 * F0, np.inf, limit=400, epsrel=1e-12)[0]
    val = near + tail
    assert val == pytest.approx(np.pi * Q * F0 / 2, rel=1e-8)


def test_displacement_psd_check_values():
    # S_z(0) and S_z(f0) for k = 2.8 N/m, f0 = 75 kHz, Q = 200, T = 300 K: S_z(0) = 2 kB T / (pi k f0 Q)
    # (one-sided fluctuation-dissipation spectrum, textbook; values computed with numpy).
    a0 = 2 * KB * 300.0 / (np.pi * 2.8 * 75e3 * 200)
    s = oscillator_psd(np.array([0.0, 75e3]), f0_hz=75e3, q=200, a0_v2_per_hz=a0)
    assert s[0] == pytest.approx(6.27820e-29, rel=1e-5)
    assert s[1] == pytest.approx(2.51128e-24, rel=1e-5)


def test_inverse_check_k_exactly():
    # T = 298.15 K, k = 2.8 N/m, InvOLS 50 nm/V -> A0 = 2.04015e-14 V^2/Hz; the fit formula gives k = 2.8.
    area = 2.04015e-14 * np.pi * 200 * 75e3 / 2
    assert area == pytest.approx(4.80699e-7, rel=1e-5)
    k = spring_constant_from_thermal(area, invols_m_per_v=50e-9, temperature_k=298.15)
    assert k == pytest.approx(2.8, rel=1e-5)


def test_equipartition_simple_case():
    # <z1^2> = (40 pm)^2 at 298.15 K: kB T/<z^2> = 2.57275; x0.971 = 2.49734; x0.817 = 2.10306 N/m.
    area = (40e-12) ** 2
    assert spring_constant_from_thermal(area, invols_m_per_v=1.0, temperature_k=298.15,
                                        correction_factor=1.0) == pytest.approx(2.57275, rel=1e-5)
    assert spring_constant_from_thermal(area, invols_m_per_v=1.0, temperature_k=298.15,
                                        correction_factor=BETA_D) == pytest.approx(2.49734, rel=1e-5)
    assert spring_constant_from_thermal(area, invols_m_per_v=1.0,
                                        temperature_k=298.15) == pytest.approx(2.10306, rel=1e-5)


def test_higgins_invols_check_values():
    # Higgins et al. 2006, Rev. Sci. Instrum. 77, 013701, with the Butt-Jaschke factors: 50.0000 nm/V
    # (static), 54.4858 nm/V (dynamic), 55.3023 nm/V bare form.
    area = 2.04015e-14 * np.pi * 200 * 75e3 / 2
    kw = dict(k_n_per_m=2.8, temperature_k=298.15)
    assert invols_from_thermal(area, **kw) * 1e9 == pytest.approx(50.0000, rel=1e-5)
    assert invols_from_thermal(area, correction_factor=BETA_D, **kw) * 1e9 == pytest.approx(54.4858, rel=1e-5)
    assert invols_from_thermal(area, correction_factor=1.0, **kw) * 1e9 == pytest.approx(55.3023, rel=1e-5)


def test_detection_factors_follow_from_modes():
    # Butt & Jaschke 1995: mode-1 share of <z^2> is 12/alpha1^4 (alpha1 root of 1 + cos a cosh a = 0), and the
    # optical lever reads the end slope, which for mode 1 is chi1 times that of a static end load of the same end
    # deflection (3 z / 2L): chi1 = (2/3) L phi'(L) / phi(L) with the clamped-free Euler-Bernoulli mode
    # phi = cosh - cos - s (sinh - sin), s = (cosh a + cos a) / (sinh a + sin a); computed here (0.917670)
    a = scipy.optimize.brentq(lambda a: 1 + np.cos(a) * np.cosh(a), 1.5, 2.5, xtol=1e-14)
    s = (np.cosh(a) + np.cos(a)) / (np.sinh(a) + np.sin(a))
    chi1 = 2 / 3 * a * (np.sinh(a) + np.sin(a) - s * (np.cosh(a) - np.cos(a))) / (
        np.cosh(a) - np.cos(a) - s * (np.sinh(a) - np.sin(a)))
    assert chi1 == pytest.approx(0.917670, abs=1e-6)  # the value as Butt & Jaschke give it, from memory
    assert DETECTION_FACTORS["displacement"] == pytest.approx(12 / a**4, rel=2e-6)
    assert DETECTION_FACTORS["optical-lever"] == pytest.approx(12 / a**4 * chi1**2, rel=2e-6)


# --- fits on synthetic spectra with known truth ------------------------------------------------------

def _fit_gamma(seed, *, n=10, df=10.0, white_frac=0.01, one_over_f=0.0, background="white+1/f", **kw):
    rng = np.random.default_rng(seed)
    f = np.arange(0, 250e3 + df / 2, df)
    s = true_psd(f, F0, Q, A0, white_frac * PEAK, one_over_f)
    p = gamma_periodogram(f, s, n, rng)
    p[0] = 0.0
    fit = fit_thermal_spectrum(f, p, averages=n, background=background, **kw)
    return fit, calibrate_thermal(fit, temperature_k=T_TRUE, invols_m_per_v=INVOLS)


def test_fit_recovers_truth_with_white_and_one_over_f_background():
    # 1/f term equal to the white level at 10 kHz, white level 1 % of the peak.
    fit, res = _fit_gamma(1, n=20, df=5.0, one_over_f=0.01 * PEAK * 1e4)
    assert abs(res.f0_hz - F0) < 4 * res.f0_std_hz
    assert abs(res.q - Q) < 4 * res.q_std
    assert abs(res.k_n_per_m - K_TRUE) < 4 * res.k_std_n_per_m
    assert res.k_std_n_per_m / K_TRUE < 0.03
    assert fit.white_v2_per_hz + fit.one_over_f_v2 / F0 == pytest.approx(0.01 * PEAK * (1 + 1e4 / F0), rel=0.05)
    assert fit.warnings == ()


def test_normalised_residuals_have_unit_variance():
    fit, _ = _fit_gamma(2, n=50, df=5.0)
    r = fit.normalised_residuals()
    assert np.mean(r) == pytest.approx(0.0, abs=4 / np.sqrt(r.size))
    assert np.var(r) == pytest.approx(1.0, rel=0.1)


def test_estimator_is_the_unbiased_one():
    """Norrelykke & Flyvbjerg 2010: LSQ with data weights biases amplitudes by (1 - 2/n), LSQ with model
    weights by (1 + 1/n); maximum likelihood is unbiased. k ~ 1/A0 shows the inverse factors
    (n = 10: 1.25 and 0.909)."""
    n, df, half = 10, 10.0, 5 * F0 / Q
    ratios = {"mle": [], "data": [], "theory": []}
    for seed in range(120):
        rng = np.random.default_rng(1000 + seed)
        f = np.arange(F0 - half, F0 + half + df / 2, df)
        p = gamma_periodogram(f, true_psd(f, F0, Q, A0, 0.01 * PEAK, 0.0), n, rng)
        fit = fit_thermal_spectrum(f, p, averages=n, background="white", f0_guess_hz=F0,
                                   fit_range_hz=(f[0], f[-1]))
        ratios["mle"].append(A0 / fit.a0_v2_per_hz * F0 * Q / (fit.f0_hz * fit.q))
        x0 = np.array([F0, Q, A0, 0.01 * PEAK])

        def model(x):
            return true_psd(f, x[0] * F0, x[1] * Q, x[2] * A0, x[3] * 0.01 * PEAK, 0.0)
        for key, resid in (("data", lambda x: (p - model(x)) / p), ("theory", lambda x: (p - model(x)) / model(x))):
            x = scipy.optimize.least_squares(resid, x0 / x0, method="lm").x
            ratios[key].append(1.0 / (x[0] * x[1] * x[2]))
    r = {k: np.array(v) for k, v in ratios.items()}
    se = r["mle"].std(ddof=1) / np.sqrt(r["mle"].size)
    assert abs(r["mle"].mean() - 1) < 3 * se + 1e-3
    assert r["data"].mean() == pytest.approx(1 / (1 - 2 / n), rel=0.04)
    assert r["theory"].mean() == pytest.approx(n / (n + 1), rel=0.02)


def test_time_series_record_end_to_end():
    fs, n = 1e6, 2**21
    rng = np.random.default_rng(21)
    x = shaped_series(n, fs, lambda f: true_psd(f, F0, Q, A0, 0.02 * PEAK, 0.02 * PEAK * 2e4), rng)
    res = analyse_thermal_record(x.astype(np.float32), fs, invols_m_per_v=INVOLS, temperature_k=T_TRUE)
    d = res.to_dict()
    assert set(d) == {"f0_hz", "f0_std_hz", "q", "q_std", "peak_area_v2", "k_n_per_m", "k_std_n_per_m",
                      "invols_nm_per_v", "invols_std_nm_per_v", "temperature_k", "correction_factor"}
    assert all(v is None or type(v) is float for v in d.values())
    assert d["invols_nm_per_v"] == pytest.approx(50.0)
    assert d["correction_factor"] == 0.817434
    assert abs(res.k_n_per_m - K_TRUE) < 4 * res.k_std_n_per_m
    assert abs(res.f0_hz - F0) < 4 * res.f0_std_hz and abs(res.q - Q) < 4 * res.q_std
    # Statistical limit sqrt(Q / (pi f0 T)) = 2.0 % for 2.1 s; the reported error must be close to it.
    limit = np.sqrt(Q / (np.pi * F0 * n / fs))
    assert 0.9 * limit < res.k_std_n_per_m / K_TRUE < 1.4 * limit
    assert res.fit.spectrum is not None and res.fit.spectrum.n_segments >= 15


def test_k_given_gives_invols_and_no_sensitivity_gives_none():
    fit, _ = _fit_gamma(3, n=20)
    res = calibrate_thermal(fit, temperature_k=T_TRUE, k_n_per_m=K_TRUE, k_std_n_per_m=0.028)
    assert abs(res.invols_m_per_v - INVOLS) < 4 * res.invols_std_m_per_v
    assert res.to_dict()["invols_nm_per_v"] == pytest.approx(res.invols_m_per_v * 1e9)
    bare = calibrate_thermal(fit, temperature_k=T_TRUE).to_dict()
    assert bare["k_n_per_m"] is None and bare["k_std_n_per_m"] is None and bare["invols_nm_per_v"] is None
    disp = calibrate_thermal(fit, temperature_k=T_TRUE, invols_m_per_v=INVOLS, detection="displacement")
    assert disp.correction_factor == 0.970688
    with pytest.raises(ValueError, match="not both"):
        calibrate_thermal(fit, invols_m_per_v=INVOLS, k_n_per_m=K_TRUE)
    with pytest.raises(ValueError, match="detection"):
        calibrate_thermal(fit, invols_m_per_v=INVOLS, detection="capacitive")


def test_under_resolved_peak_warns():
    fit, _ = _fit_gamma(4, n=20, df=60.0)  # FWHM 375 Hz: about 6 bins
    assert any("bins per FWHM" in w for w in fit.warnings)


# --- clear errors -------------------------------------------------------------------------------------

def test_error_is_value_error():
    assert issubclass(ThermalFitError, ValueError)


@pytest.mark.parametrize("record, match", [
    (np.zeros(0), "empty"),
    (np.ones(1000), "too short"),
    (np.r_[np.random.default_rng(0).standard_normal(5000), np.nan, np.zeros(5000)], "finite"),
    (np.full(100_000, 0.25, dtype=np.float32), "constant"),
])
def test_bad_records(record, match):
    with pytest.raises(ThermalFitError, match=match):
        analyse_thermal_record(record, 1e6)


def test_background_only_has_no_peak():
    rng = np.random.default_rng(9)
    x = shaped_series(2**20, 1e6, lambda f: true_psd(f, F0, Q, 0.0, 1e-12, 1e-12 * 2e4), rng)
    with pytest.raises(ThermalFitError, match="no resonance peak"):
        analyse_thermal_record(x, 1e6, invols_m_per_v=INVOLS)


def test_peak_too_close_to_nyquist():
    fs = 2 * F0 / 0.9  # f0 at 0.9 of Nyquist
    rng = np.random.default_rng(10)
    x = shaped_series(2**20, fs, lambda f: true_psd(f, F0, Q, A0, 0.01 * PEAK, 0.0), rng)
    with pytest.raises(ThermalFitError, match="Nyquist"):
        analyse_thermal_record(x, fs, invols_m_per_v=INVOLS)


# --- statistical quality ------------------------------------------------------------------------------

@pytest.mark.slow
def test_bias_and_spread_over_seeds():
    """>= 100 records of 4.2 s: bias of k < 0.5 %, spread within 1.2x the statistical limit
    sqrt(Q / (pi f0 T)) (the limit for the mean square of a damped oscillator observed for T)."""
    fs, n = 1e6, 2**22
    ks, stds = [], []
    for seed in range(100):
        rng = np.random.default_rng(seed)
        x = shaped_series(n, fs, lambda f: true_psd(f, F0, Q, A0, 0.01 * PEAK, 0.01 * PEAK * 1e4), rng)
        res = analyse_thermal_record(x.astype(np.float32), fs, invols_m_per_v=INVOLS, temperature_k=T_TRUE)
        ks.append(res.k_n_per_m / K_TRUE)
        stds.append(res.k_std_n_per_m / K_TRUE)
    ks = np.array(ks)
    limit = np.sqrt(Q / (np.pi * F0 * n / fs))
    assert abs(ks.mean() - 1) < 0.005
    assert ks.std(ddof=1) < 1.2 * limit
    assert np.mean(stds) == pytest.approx(ks.std(ddof=1), rel=0.3)  # reported errors are honest


def test_explicit_window_and_start_value():
    fit_auto, _ = _fit_gamma(6, n=20)
    fit_range, _ = _fit_gamma(6, n=20, fit_range_hz=(72e3, 78e3))
    fit_guess, _ = _fit_gamma(6, n=20, f0_guess_hz=74.9e3)
    assert fit_range.fit_range_hz[0] >= 72e3 and fit_range.fit_range_hz[1] <= 78e3
    assert abs(fit_range.f0_hz - F0) < 4 * fit_range.f0_std_hz
    assert fit_guess.f0_hz == pytest.approx(fit_auto.f0_hz, rel=1e-9)
    with pytest.raises(ThermalFitError, match="fit_range_hz"):
        _fit_gamma(6, fit_range_hz=(78e3, 72e3))


def test_a_narrow_interference_line_is_not_taken_for_the_resonance():
    # A 1 mV sine at 20 kHz (5e-7 V^2, as much power as the thermal peak's 4.8e-7 V^2) stands far higher above
    # the background than the peak; the search took it and the fit failed (no convergence). A line fills the
    # Hann window's main lobe (half-power width 1.44 bins, Harris 1978, Proc. IEEE 66, 51); the resonance is wide.
    fs, n = 1e6, 2**21
    x = shaped_series(n, fs, lambda f: true_psd(f, F0, Q, A0, 0.01 * PEAK, 0.0), np.random.default_rng(23))
    x += 1e-3 * np.sin(2 * np.pi * 20e3 * np.arange(n) / fs)
    res = analyse_thermal_record(x, fs, invols_m_per_v=INVOLS, temperature_k=T_TRUE)
    assert abs(res.f0_hz - F0) < 4 * res.f0_std_hz and abs(res.q - Q) < 4 * res.q_std
    assert abs(res.k_n_per_m - K_TRUE) < 4 * res.k_std_n_per_m
    line_only = shaped_series(n, fs, lambda f: true_psd(f, F0, Q, 0.0, 0.01 * PEAK, 0.0), np.random.default_rng(24))
    line_only += 1e-3 * np.sin(2 * np.pi * 20e3 * np.arange(n) / fs)
    with pytest.raises(ThermalFitError, match=r"only narrow lines stand out of the background \(at 2000\d"):
        analyse_thermal_record(line_only, fs, invols_m_per_v=INVOLS)
