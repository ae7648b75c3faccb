"""Thermal limit of Albrecht, Grutter, Horne & Rugar 1991 (J. Appl. Phys. 69, 668; formula from memory) with
the worked example k = 2.8 N/m, f0 = 75 kHz, Q = 200, T = 300 K, B = 100 Hz, A = 10 nm."""

import numpy as np
import pytest

from assistant.analysis.lift_series import noise_floor as nf

EX = dict(spring_constant_n_per_m=2.8, resonance_hz=75e3, quality_factor=200.0, temperature_k=300.0,
          bandwidth_hz=100.0, amplitude_m=10e-9)


def test_thermal_limit_rms_and_peak_conventions():
    # A = 10 nm taken as rms: 2.2186e-5 N/m; as peak (rms 7.07 nm): 3.1376e-5 N/m; tolerance 1e-4 relative
    assert nf.thermal_min_gradient_n_per_m(**EX, amplitude_is_rms=True) == pytest.approx(2.2186e-5, rel=1e-4)
    assert nf.thermal_min_gradient_n_per_m(**EX) == pytest.approx(3.1376e-5, rel=1e-4)


def test_thermal_phase_noise():
    # rms case: Q dF'/k = 1.5847e-3 rad = 0.091 deg
    p = nf.thermal_min_phase_deg(**EX, amplitude_is_rms=True)
    assert np.radians(p) == pytest.approx(1.5847e-3, rel=1e-4)


def test_white_noise_std_recovers_noise():
    rng = np.random.default_rng(5)
    img = rng.normal(scale=0.07, size=(256, 256))
    assert nf.white_noise_std(img) == pytest.approx(0.07, rel=0.02)
    # a smooth large-scale signal does not leak into the high band
    yy, xx = np.mgrid[0:256, 0:256]
    smooth = 3.0 * np.sin(2 * np.pi * xx / 64) * np.cos(2 * np.pi * yy / 128)
    assert nf.white_noise_std(img + smooth) == pytest.approx(0.07, rel=0.02)


def test_verdicts():
    t = nf.thermal_min_phase_deg(**EX)
    kw = {k: v for k, v in EX.items()}
    assert nf.noise_verdict(1.1 * t, **kw).verdict == "thermal_limit"
    v = nf.noise_verdict(4.0 * t, **kw)
    assert v.verdict == "excess_noise" and v.ratio == pytest.approx(4.0)
    assert nf.noise_verdict(0.3 * t, **kw).verdict == "below_thermal_limit"
    assert nf.noise_verdict(0.1).verdict == "unknown"


def test_bad_inputs_name_quantity():
    with pytest.raises(ValueError, match="bandwidth_hz"):
        nf.thermal_min_gradient_n_per_m(**{**EX, "bandwidth_hz": 0.0})
