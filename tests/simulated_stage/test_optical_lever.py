"""Optical lever: mode-1 volts = z / (chi InvOLS_static) so the Butt-Jaschke factors hold; detector noise."""

import math

import numpy as np
import pytest
from scipy.signal import welch

from simulated_stage.optical_lever import CHI, FlickerNoise, OpticalLever
from simulated_stage.scenario import Scenario, build_microscope
from tests.simulated_stage.fake_sample import FlatSample

KB = 1.380649e-23


def test_chi_is_the_butt_jaschke_ratio():
    # Butt & Jaschke 1995, Nanotechnology 6, 1 (from memory): first-mode factors 0.971 (displacement) and
    # 0.817 (statically calibrated optical lever); chi = sqrt(0.971/0.817) = 1.09.
    assert CHI**2 == pytest.approx(0.970688 / 0.817434, rel=1e-12)
    assert CHI == pytest.approx(1.0897, abs=1e-4)


def test_dynamic_and_static_gains():
    ol = OpticalLever(invols_m_per_v=40e-9)
    assert ol.static_volts(40e-9) == pytest.approx(1.0)
    assert ol.dynamic_volts(40e-9) == pytest.approx(1.0 / CHI)


def test_white_noise_level_is_one_sided_density():
    # scipy.signal.welch(scaling="density") is one-sided: white noise of variance s^2 reads 2 s^2 / fs.
    ol = OpticalLever(white_noise_v_per_rthz=3e-6)
    fs = 1e6
    x = np.random.default_rng(0).standard_normal(1 << 20) * ol.white_std_v(fs)
    f, p = welch(x, fs, nperseg=4096)
    assert p[1:-1].mean() == pytest.approx((3e-6) ** 2, rel=0.01)


def test_flicker_noise_falls_as_one_over_f():
    fs, level = 2000.0, 1e-5
    gen = FlickerNoise(level, fs, np.random.default_rng(2))
    x = np.concatenate([gen.next_chunk(100_000) for _ in range(20)])
    f, p = welch(x, fs, nperseg=1 << 16)
    sel = (f > 0.3) & (f < 100)
    slope = np.polyfit(np.log(f[sel]), np.log(p[sel]), 1)[0]
    assert slope == pytest.approx(-1.0, abs=0.1)
    # the density at 1 Hz is the requested level (two Lorentzians per decade: ripple about 1 dB)
    assert np.median(p[sel] * f[sel]) == pytest.approx(level**2, rel=0.3)


def test_flicker_hold_continues_across_chunks():
    a = FlickerNoise(1e-5, 2e6, np.random.default_rng(5))
    b = FlickerNoise(1e-5, 2e6, np.random.default_rng(5))
    xa = np.concatenate([a.next_chunk(n) for n in (1, 7, 333, 5000, 123457)])
    xb = b.next_chunk(xa.size)
    np.testing.assert_array_equal(xa, xb)


QUIET = """
[probe]
spring_constant_n_per_m = 2.8
resonance_hz = 75000.0
quality_factor = 200.0
invols_nm_per_v = 50.0
length_um = 225.0
width_um = 34.65
[environment]
temperature_k = 298.15
[instrument]
detector_noise_uv_per_rthz = 0.0
flicker_uv_per_rthz_at_1hz = 0.0
"""


def test_recorded_deflection_carries_butt_jaschke_factors():
    scenario = Scenario.from_text(QUIET)
    vm = build_microscope(scenario, seed=4, sample=FlatSample())
    fs, seconds = 400e3, 10.0
    v = np.concatenate(list(vm.record_deflection(int(fs * seconds), fs)))
    invols = 50e-9
    kt = KB * 298.15
    err = 3 * math.sqrt(200.0 / (math.pi * 75e3 * seconds))  # 3 sigma of a mean square over 10 s
    # true end displacement = V chi InvOLS: <z^2> = 0.971 kT/k (Butt & Jaschke 1995)
    assert np.mean((v * CHI * invols) ** 2) / (0.970688 * kt / 2.8) == pytest.approx(1.0, abs=err)
    # optical lever with the static InvOLS: k = 0.817 kT / <(V InvOLS)^2>
    assert 0.817434 * kt / np.mean((v * invols) ** 2) == pytest.approx(2.8, rel=err)
    assert vm.clock.now_s == pytest.approx(seconds)
