"""The stage's electromagnet, its switching dots and the tip's reversal; the dot's stray field against magpylib."""

from __future__ import annotations

import math

import magpylib
import numpy as np
import pytest

from simulated_stage.clock import VirtualClock
from simulated_stage.dots import DotElements, tip_direction
from simulated_stage.errors import ScenarioError, StageLimitError
from simulated_stage.magnet import Electromagnet, MagnetConfig
from simulated_stage.magnetism import StrayField, pattern_maps, pixel_centres_m
from simulated_stage.sample import SampleSpec, build_sample
from simulated_stage.scenario import load_scenario
from simulated_stage.tip import TipSpec, point_probe_field


def test_dot_stray_field_against_magpylib_cylinder():
    # One dot of the `dots` pattern (diameter p/2 = 250 nm, 15 nm thick, +z, 1000 kA/m) against the analytic
    # field of a uniformly magnetised cylinder (magpylib.magnet.Cylinder; Ortner & Coliado Bandeira 2020,
    # SoftwareX 11, 100466). The map is one lattice period wide, so it holds exactly one dot at its centre.
    pixel, period, t, ms = 2.5e-9, 500e-9, 15e-9, 1e6
    n = int(round(period / pixel))
    _, mz, _ = pattern_maps("dots", n=n, pixel_m=pixel, period_m=period, transition_m=0.0, ms_a_per_m=ms,
                            rng=np.random.default_rng(0))
    mz = np.abs(mz)
    field = StrayField(np.zeros_like(mz), mz, pixel_m=pixel, thickness_m=t, pad_m=1.5e-6, halo_px=0)
    x = pixel_centres_m(n, pixel)
    cylinder = magpylib.magnet.Cylinder(dimension=(period / 2, t), magnetization=(0, 0, ms), position=(0, 0, -t / 2))
    for height in (30e-9, 80e-9, 150e-9):
        hz = field.hz(height)
        for j in (n // 2, n // 2 + 40, n // 2 + 60, n // 2 + 90):  # centre, inside, near the edge, outside
            ref = cylinder.getH((x[j], x[n // 2], height))[2]
            got = hz[n // 2, j]
            assert got == pytest.approx(ref, rel=5e-3, abs=5e-3 * abs(cylinder.getH((0, 0, height))[2]))


def test_magnet_ramps_and_settles_on_the_virtual_clock():
    clock = VirtualClock("fast")
    magnet = Electromagnet(MagnetConfig(max_a_per_m=600e3, ramp_a_per_m_per_s=100e3, settle_s=1.5,
                                        noise_a_per_m=20.0), clock)
    magnet.ramp_to(-400e3)
    assert clock.now_s == pytest.approx(4.0 + 1.5)
    magnet.ramp_to(-400e3)  # already there: no time
    assert clock.now_s == pytest.approx(5.5)
    reads = [magnet.read(np.random.default_rng(i)) for i in range(200)]
    assert np.mean(reads) == pytest.approx(-400e3, abs=5.0) and np.std(reads) == pytest.approx(20.0, rel=0.2)
    for bad in (600.001e3, -1e9, math.nan, math.inf):
        with pytest.raises(StageLimitError, match="applied field"):
            magnet.ramp_to(bad)
    assert magnet.field_a_per_m == -400e3


def _dots(spread: float = 40e3, seed: int = 0):
    n, pixel, period = 100, 10e-9, 250e-9
    _, mz, _ = pattern_maps("dots", n=n, pixel_m=pixel, period_m=period, transition_m=0.0, ms_a_per_m=1e6,
                            rng=np.random.default_rng(seed))
    mz = np.abs(mz)  # all up: a saturated start
    return DotElements(mz, pixel_m=pixel, period_m=period, switching_mean_a_per_m=300e3,
                       switching_spread_a_per_m=spread, rng=np.random.default_rng(seed)), mz


def test_dots_switch_at_their_own_fields_and_stay_switched():
    dots, mz = _dots()
    assert dots.count == 25  # 1 um map centred on a dot, 250 nm lattice: 3 x 3 whole dots and the cut ones
    assert np.std(dots.switching_a_per_m) == pytest.approx(40e3, rel=0.5)
    h_sw = dots.switching_a_per_m
    for field in (-250e3, -300e3, -320e3):
        pix, old = dots.apply_field(field)
        assert np.all(old > 0) and np.all(mz.ravel()[pix] < 0)
        np.testing.assert_array_equal(dots.polarity() < 0, h_sw < -field)
    before = dots.polarity().copy()
    dots.apply_field(0.0)  # back to zero: nothing moves (hysteresis)
    dots.apply_field(-100e3)
    np.testing.assert_array_equal(dots.polarity(), before)
    dots.apply_field(500e3)
    assert np.all(dots.polarity() > 0)
    # every pixel of a dot changes together
    for i in range(dots.count):
        assert np.unique(np.sign(mz.ravel()[dots.pixels[dots.starts[i]:dots.starts[i + 1]]])).size == 1


def test_tip_field_adds_to_the_applied_field():
    dots, mz = _dots(spread=0.0)  # every dot switches at 300 kA/m
    m = -1e-15  # a tip magnetised along -z: its field under it points -z
    height = 60e-9
    _, _, hz = point_probe_field(0.0, 0.0, height, moment_a_m2=m, monopole_a_m=0.0)
    assert hz < -20e3
    target = int(np.argmin(np.hypot(dots.x_m - 0.0, dots.y_m - 0.0)))
    x = np.linspace(-400e-9, 400e-9, 81)
    y = np.full_like(x, dots.y_m[target])
    # the applied field alone is 15 kA/m short; the tip passing over the dot's centre supplies the rest
    pix, _ = dots.expose(x, y, np.full_like(x, height), field_a_per_m=-285e3, moment_a_m2=m, monopole_a_m=0.0)
    flipped = np.flatnonzero(dots.polarity() < 0)
    assert target in flipped and pix.size > 0
    # only the dots the tip passed close to: none more than one lattice period away from its path
    assert np.all(np.abs(dots.y_m[flipped] - dots.y_m[target]) < 1e-9)
    # a tip far above changes nothing
    dots2, _ = _dots(spread=0.0)
    pix, _ = dots2.expose(x, y, np.full_like(x, 400e-9), field_a_per_m=-285e3, moment_a_m2=m, monopole_a_m=0.0)
    assert pix.size == 0


def test_tip_coating_reverses_past_its_coercive_field():
    assert tip_direction(1.0, -199e3, 200e3) == 1.0
    assert tip_direction(1.0, -201e3, 200e3) == -1.0
    assert tip_direction(-1.0, 150e3, 200e3) == -1.0
    assert tip_direction(-1.0, 250e3, 200e3) == 1.0


def test_sample_inverts_the_magnetic_part_when_the_tip_reverses():
    spec = SampleSpec(pattern="dots", period_nm=250.0, extent_um=1.0, pixel_nm=10.0, roughness_nm=0.0,
                      feature_height_nm=10.0, coercive_field_ka_per_m=300.0, switching_field_spread_ka_per_m=30.0)
    sample = build_sample(spec, TipSpec(moment_a_m2=1e-16, coercive_field_ka_per_m=150.0, effective_distance_nm=60.0))
    x, y, gap = np.array([0.0, 60e-9]), np.array([0.0, 0.0]), np.array([40e-9, 40e-9])
    before = sample.interaction(x, y, gap, bias_v=0.0, amplitude_m=10e-9).magnetic_gradient_n_per_m
    sample.apply_field(-120e3)  # neither the tip (150) nor any dot (> 0.01 x 300) reverses
    assert not sample.tip_reversed
    np.testing.assert_allclose(sample.interaction(x, y, gap, bias_v=0.0, amplitude_m=10e-9).magnetic_gradient_n_per_m,
                               before, rtol=1e-12)
    polarity = sample._dots.polarity().copy()
    sample.apply_field(-160e3)  # the tip reverses, dots with switching fields below 160 kA/m too
    assert sample.tip_reversed
    reversed_dots = polarity != sample._dots.polarity()
    np.testing.assert_array_equal(reversed_dots, sample._dots.switching_a_per_m < 160e3)
    assert not reversed_dots.any()  # 160 kA/m is 4.7 spreads below the mean: only the tip reversed
    after = sample.interaction(x, y, gap, bias_v=0.0, amplitude_m=10e-9).magnetic_gradient_n_per_m
    np.testing.assert_allclose(after, -before, rtol=1e-9)


def test_continuous_film_switches_as_a_whole_past_its_coercive_field():
    spec = SampleSpec(pattern="stripes", period_nm=200.0, extent_um=0.5, pixel_nm=10.0, coercive_field_ka_per_m=200.0)
    sample = build_sample(spec, TipSpec())
    assert sample.apply_field(150e3) == 0
    assert sample.apply_field(250e3) > 0
    assert np.all(sample.magnetisation_maps()[1] >= 0)


def test_scenario_keys_of_the_field_series():
    s = load_scenario("dot-loop")
    lim = s.instrument_config().limits
    assert (lim.field_max_a_per_m, lim.field_ramp_a_per_m_per_s, lim.field_settle_s) == (600e3, 100e3, 1.0)
    assert s.sample.switching_field_spread_ka_per_m == 40.0 and s.tip.coercive_field_ka_per_m == 200.0
    with pytest.raises(ScenarioError, match="switching_field_spread_ka_per_m"):
        SampleSpec(switching_field_spread_ka_per_m=-1.0)
    with pytest.raises(ScenarioError, match="coercive_field_ka_per_m"):
        TipSpec(coercive_field_ka_per_m=0.0)
