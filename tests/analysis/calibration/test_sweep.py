"""Drive-sweep fit against the driven damped oscillator written out here from its equation of motion.

Steady state of m z'' + gamma z' + k z = F0 cos(w t) (textbook; e.g. the exact linear steady state used for
dynamic AFM by Albrecht et al. 1991, J. Appl. Phys. 69, 668): amplitude F0 / sqrt((k - m w^2)^2 + (gamma w)^2),
lag atan2(gamma w, k - m w^2). The instruments report the lock-in phase as -(lag - 90 deg) + offset.
"""

import numpy as np
import pytest

from assistant.analysis.calibration.sweep import (
    SweepFitError, compare_q, drive_amplitude_for_free_amplitude, drive_frequency, fit_drive_sweep,
    setpoint_from_ratio, sweep_response_v_per_v,
)


def synthetic_sweep(f, *, f0, q, k=2.8, drive_n=1e-9, volts_per_m=2e7, offset_deg=0.0, rng=None,
                    amp_noise_v=0.0, phase_noise_deg=0.0):
    w, w0 = 2 * np.pi * f, 2 * np.pi * f0
    m = k / w0**2
    gamma = m * w0 / q
    amp_m = drive_n / np.sqrt((k - m * w**2) ** 2 + (gamma * w) ** 2)
    lag = np.degrees(np.arctan2(gamma * w, k - m * w**2))
    phase = -(lag - 90.0) + offset_deg
    amp = amp_m * volts_per_m
    if rng is not None:
        amp = amp + rng.normal(0, amp_noise_v, f.size)
        phase = phase + rng.normal(0, phase_noise_deg, f.size)
    phase = (phase + 180) % 360 - 180  # the lock-in wraps
    return amp, phase, drive_n / k * q * volts_per_m


@pytest.mark.parametrize("offset", [0.0, 37.0, 170.0, -120.0])
def test_recovers_truth_with_any_offset(offset):
    rng = np.random.default_rng(int(offset) % 97)
    f = np.linspace(74.0e3, 76.0e3, 301)
    amp, phase, a_res = synthetic_sweep(f, f0=75e3, q=200, offset_deg=offset, rng=rng, amp_noise_v=0.002,
                                        phase_noise_deg=0.3)
    r = fit_drive_sweep(f, amp, phase)
    assert abs(r.f0_hz - 75e3) < 4 * r.f0_std_hz
    assert abs(r.q - 200) < 4 * r.q_std
    assert abs((r.phase_offset_deg - offset + 180) % 360 - 180) < 4 * r.phase_offset_std_deg
    assert abs(r.amplitude_at_resonance_v - a_res) < 4 * r.amplitude_at_resonance_std_v
    assert r.phase_noise_deg == pytest.approx(0.3, rel=0.15)
    assert r.amplitude_noise_v == pytest.approx(0.002, rel=0.15)


def test_noise_free_sweep_exact_and_low_q():
    f = np.linspace(5e3, 25e3, 200)
    amp, phase, a_res = synthetic_sweep(f, f0=13e3, q=5.0, offset_deg=-20)
    r = fit_drive_sweep(f[::-1], amp[::-1], phase[::-1])  # order does not matter
    assert r.f0_hz == pytest.approx(13e3, rel=1e-8)
    assert r.q == pytest.approx(5.0, rel=1e-8)
    assert r.amplitude_at_resonance_v == pytest.approx(a_res, rel=1e-8)
    d = r.to_dict()
    assert set(d) == {"f0_hz", "f0_std_hz", "q", "q_std", "phase_offset_deg", "amplitude_at_resonance_v"}
    assert all(type(v) is float for v in d.values())


def test_reported_errors_match_scatter():
    f = np.linspace(74.4e3, 75.6e3, 121)
    f0s, qs, f0_std, q_std = [], [], [], []
    for seed in range(40):
        amp, phase, _ = synthetic_sweep(f, f0=75e3, q=200, rng=np.random.default_rng(seed), amp_noise_v=0.005,
                                        phase_noise_deg=0.5)
        r = fit_drive_sweep(f, amp, phase)
        f0s.append(r.f0_hz); qs.append(r.q); f0_std.append(r.f0_std_hz); q_std.append(r.q_std)
    # 40 runs: the sample SD itself scatters by about 11 %.
    assert np.std(f0s, ddof=1) == pytest.approx(np.mean(f0_std), rel=0.35)
    assert np.std(qs, ddof=1) == pytest.approx(np.mean(q_std), rel=0.35)


def test_errors():
    f = np.linspace(74e3, 76e3, 50)
    amp, phase, _ = synthetic_sweep(f, f0=75e3, q=200)
    with pytest.raises(SweepFitError, match="edge"):
        fit_drive_sweep(f[:20], amp[:20], phase[:20])  # resonance outside the sweep
    with pytest.raises(SweepFitError, match="non-finite"):
        fit_drive_sweep(f, np.r_[amp[:-1], np.nan], phase)
    with pytest.raises(SweepFitError, match="points"):
        fit_drive_sweep(f[:5], amp[:5], phase[:5])
    with pytest.raises(SweepFitError, match="constant"):
        fit_drive_sweep(f, np.ones_like(f), phase)
    assert issubclass(SweepFitError, ValueError)


def test_operating_point_helpers():
    f = np.linspace(74e3, 76e3, 201)
    amp, phase, a_res = synthetic_sweep(f, f0=75e3, q=200)
    r = fit_drive_sweep(f, amp, phase)
    assert drive_frequency(r) == r.f0_hz
    # Steepest slope of the Lorentzian amplitude at f0 (1 -+ 1/(2 sqrt 2 Q)) (derived here).
    lo = drive_frequency(r, side="below")
    assert lo == pytest.approx(75e3 * (1 - 1 / (2 * np.sqrt(2) * 200)), rel=1e-8)
    fine = np.linspace(74.7e3, 75e3, 30001)
    a_fine, _, _ = synthetic_sweep(fine, f0=75e3, q=200)
    assert fine[np.argmax(np.gradient(a_fine))] == pytest.approx(lo, abs=1.0)
    # 10 nm free amplitude, 50 nm/V, 2 V/V response -> 0.1 V of drive.
    assert drive_amplitude_for_free_amplitude(10e-9, invols_m_per_v=50e-9, response_v_per_v=2.0) == \
        pytest.approx(0.1)
    with pytest.raises(ValueError,
                       match="free amplitude of 10 nm needs a drive of 0.1 V, above the drive limit of 0.05 V"):
        drive_amplitude_for_free_amplitude(10e-9, invols_m_per_v=50e-9, response_v_per_v=2.0, max_drive_v=0.05)
    assert sweep_response_v_per_v(r, r.f0_hz, drive_amplitude_v=0.5) == pytest.approx(a_res / 0.5, rel=1e-8)
    assert setpoint_from_ratio(0.4, 0.7) == pytest.approx(0.28)
    for bad in (0.0, 1.0, 1.2, -0.1):
        with pytest.raises(ValueError, match="ratio"):
            setpoint_from_ratio(0.4, bad)


def test_q_cross_check():
    class T:
        q, q_std = 205.0, 4.0
    class S:
        q, q_std = 200.0, 3.0
    c = compare_q(S, T)
    assert c.ratio == pytest.approx(200 / 205)
    assert c.z_score == pytest.approx(-1.0)
    assert c.consistent
    T.q = 230.0
    assert not compare_q(S, T).consistent


def _lockin_sweep(f, rng, *, f0=75e3, q=200.0, thermal_fraction=0.003, white_v=0.0005):
    """The lock-in's complex noise: the detector's white part plus thermal force noise, which reaches the detector
    through the lever's response like the drive does, so its standard deviation is proportional to the amplitude
    (fluctuation-dissipation, e.g. Albrecht et al. 1991, J. Appl. Phys. 69, 668). In-phase and quadrature noise are
    independent and equal."""
    amp, phase, _ = synthetic_sweep(f, f0=f0, q=q, volts_per_m=5.6e6, offset_deg=-12.0)  # 0.4 V at f0
    sigma = np.hypot(thermal_fraction * amp, white_v)
    z = amp * np.exp(1j * np.radians(phase)) + sigma * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size))
    return np.abs(z), np.degrees(np.angle(z))


def test_reported_errors_match_scatter_when_the_noise_follows_the_resonance():
    # One constant weight per channel gave z-score sds of 1.4 (f0) and 1.5 (Q) with this noise; weighting each
    # point by its own noise (module docstring of sweep.py) brings them to 1 and the scatter of Q down by a third.
    f = np.linspace(75e3 * (1 - 6 / 200), 75e3 * (1 + 6 / 200), 201)
    z = []
    for seed in range(200):
        amp, phase = _lockin_sweep(f, np.random.default_rng(seed))
        r = fit_drive_sweep(f, amp, phase)
        z.append(((r.f0_hz - 75e3) / r.f0_std_hz, (r.q - 200.0) / r.q_std))
    z = np.array(z)
    assert np.all(np.abs(z.mean(axis=0)) < 0.2)
    assert np.all((0.85 < z.std(axis=0, ddof=1)) & (z.std(axis=0, ddof=1) < 1.15))  # 200 runs: sd within ~5 %
