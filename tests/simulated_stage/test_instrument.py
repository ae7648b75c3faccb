"""The virtual microscope against the driven damped oscillator, the thermal limit and its own hard limits.

Most tests use a small flat fake sample (tests/simulated_stage/fake_sample.py) so that the instrument is
checked on its own; the last ones run on the real sample physics of the built-in scenarios.
"""

import math
import time

import numpy as np
import pytest
from scipy.optimize import curve_fit
from scipy.signal import welch

from simulated_stage.errors import StageFault, StageLimitError
from simulated_stage.errors import LASER_LOST, NOT_ENGAGED
from simulated_stage.lockin import driven_response
from simulated_stage.scenario import Scenario, build_microscope, load_scenario
from tests.simulated_stage.fake_sample import FlatSample

KB = 1.380649e-23
K, F0, Q, T = 2.8, 75e3, 200.0, 298.15

BASE = """
[probe]
spring_constant_n_per_m = 2.8
resonance_hz = 75000.0
quality_factor = 200.0
invols_nm_per_v = 50.0
length_um = 225.0
width_um = 34.65
drive_nm_per_v = 100.0
[environment]
temperature_k = 298.15
[instrument]
phase_offset_deg = -12.0
"""


def make(sample=None, extra="", seed=1):
    return build_microscope(Scenario.from_text(BASE + extra), seed=seed, sample=sample or FlatSample())


def engage(vm, drive_v=0.2, ratio=0.7):
    vm.set_drive(vm.f0, drive_v)
    setpoint = ratio * float(vm.free_amplitude_m()) * vm.volts_per_m
    for _ in range(100):
        vm.set_feedback(True, setpoint_v=setpoint)
        if vm.engaged:
            return setpoint
        vm.withdraw()
        vm.step_coarse(int(0.8 * vm.limits.z_range_m / vm.limits.coarse_step_m))
    raise AssertionError("no surface found")


def exact_phase_deg(fprime, k=K, q=Q):
    """Driving at the free resonance: lag = atan2(gamma w0, k - F' - m w0^2) = atan2(k/Q, -F'); reported
    phase = -(lag - 90 deg) (textbook linear steady state; sign convention of Hartmann 1999,
    Annu. Rev. Mater. Sci. 29, 53: attractive gradient -> negative phase)."""
    return -(math.degrees(math.atan2(k / q, -fprime)) - 90.0)


@pytest.mark.parametrize("fprime, exact, linear", [(1e-4, -0.409249, -0.409256), (5e-3, -19.6538, -20.4628)])
def test_phase_formula_check_values(fprime, exact, linear):
    # check values of the arctan form and of the small-gradient limit -(Q/k) F' (k 2.8 N/m, f0 75 kHz, Q 200)
    _, lag = driven_response(F0, spring_constant_n_per_m=K, resonance_hz=F0, quality_factor=Q,
                             force_gradient_n_per_m=fprime)
    assert 90.0 - math.degrees(float(lag)) == pytest.approx(exact, abs=2e-4)
    assert exact_phase_deg(fprime) == pytest.approx(exact, abs=2e-4)
    assert math.degrees(-Q / K * fprime) == pytest.approx(linear, abs=2e-4)


@pytest.mark.parametrize("fprime", [-2e-3, 1e-4, 1e-3, 5e-3])
def test_second_pass_phase_is_exact_driven_oscillator(fprime):
    vm = make(FlatSample(constant_n_per_m=fprime), "detector_noise_uv_per_rthz = 0.0\n")
    engage(vm)
    line = vm.scan_line(y_m=0.0, x_start_m=-1e-6, length_m=2e-6, pixels=512, line_rate_hz=1.0,
                        passes=[(30e-9, 0.0), (80e-9, 0.0)])
    for p in line.passes:
        phase = p.phase_deg - (-12.0)
        noise = phase.std() / math.sqrt(phase.size)
        assert phase.mean() == pytest.approx(exact_phase_deg(fprime), abs=max(5 * noise, 1e-3))
        # shifted resonance f0 sqrt(1 - F'/k) (Albrecht et al. 1991, J. Appl. Phys. 69, 668)
        assert p.frequency_shift_hz.mean() == pytest.approx(F0 * (math.sqrt(1 - fprime / K) - 1), abs=0.05)


def test_phase_is_negative_over_an_attractive_gradient():
    vm = make(FlatSample(g0_n_per_m=1e-3, z0_m=20e-9))
    engage(vm)
    heights = [10e-9, 20e-9, 40e-9, 80e-9]
    line = vm.scan_line(y_m=0.0, x_start_m=-1e-6, length_m=2e-6, pixels=256, line_rate_hz=1.0,
                        passes=[(h, 0.0) for h in heights])
    means = [p.phase_deg.mean() + 12.0 for p in line.passes]
    assert all(m < 0 for m in means)
    assert means == sorted(means)  # weaker attraction further away: less negative


def test_sweep_follows_driven_oscillator_with_offset():
    vm = make()
    f = np.linspace(F0 - 1500, F0 + 1500, 301)
    sweep = vm.sweep(f, 0.2)
    amp, lag = driven_response(f, spring_constant_n_per_m=K, resonance_hz=F0, quality_factor=Q,
                               drive_force_n=K * 100e-9 * 0.2 / Q)
    # lock-in noise: thermal PSD of the oscillator plus detector white noise, in a first-order low-pass of
    # noise-equivalent bandwidth 1/(4 tau); each quadrature has variance 2 S B
    s_th = 2 * KB * T / (math.pi * K * F0 * Q) / ((1 - (f / F0) ** 2) ** 2 + (f / (F0 * Q)) ** 2)
    sigma = np.sqrt(2 * (s_th + (2e-6 / vm.volts_per_m) ** 2) / (4 * vm.lockin.time_constant_s))
    assert np.all(np.abs(sweep.amplitude_v / vm.volts_per_m - amp) < 5 * sigma)
    assert np.all(np.abs(sweep.phase_deg - (90.0 - np.degrees(lag) - 12.0)) < np.degrees(5 * sigma / amp))
    z = (sweep.amplitude_v / vm.volts_per_m - amp) / sigma
    assert np.std(z) == pytest.approx(1.0, abs=0.2)  # the noise has the stated size
    i0 = np.argmin(abs(f - F0))
    assert sweep.phase_deg[i0] == pytest.approx(-12.0, abs=0.2)
    assert sweep.amplitude_v.max() == pytest.approx(20e-9 * vm.volts_per_m, rel=0.01)


def test_second_pass_phase_noise_is_the_thermal_limit():
    vm = make(extra="detector_noise_uv_per_rthz = 0.0\n")
    engage(vm)
    n, rate = 8192, 0.25
    line = vm.scan_line(y_m=0.0, x_start_m=-1e-6, length_m=2e-6, pixels=n, line_rate_hz=rate,
                        passes=[(200e-9, 0.0)])
    # Albrecht, Gruetter, Horne & Rugar 1991: dF'_min = sqrt(4 k kB T B / (w0 Q <z_osc^2>)), phase noise
    # Q dF'/k; <z_osc^2> = A^2 / 2 for the peak amplitude A. B: lock-in (ENBW 1/(4 tau)) then the pixel
    # average (1/(2 dwell)) combined as 1/(4 tau + 2 dwell), the stage's documented rule of thumb.
    dwell = 0.5 / (rate * n)
    bandwidth = 1.0 / (4 * vm.lockin.time_constant_s + 2 * dwell)
    amp = 20e-9
    dfp = math.sqrt(4 * K * KB * T * bandwidth / (2 * math.pi * F0 * Q * amp**2 / 2))
    expected_deg = math.degrees(Q * dfp / K)
    measured = np.std(line.passes[0].phase_deg)
    assert measured == pytest.approx(expected_deg, rel=0.05)  # SD of an SD from 8192 values: 0.8 %


def test_the_analysis_bandwidth_gives_the_thermal_limit_a_pass_meets():
    """The series analysis takes a pixel's noise bandwidth from the line rate and the pixel count alone; at the
    default run's 1 Hz and 128 pixels its Albrecht et al. (1991) limit is the noise the stage's passes have. (It
    used to take half that bandwidth, and called the stage's purely thermal noise 1.5 x its limit, "another source
    dominates".)"""
    from assistant.analysis.lift_series.noise_floor import noise_verdict
    from assistant.procedures.analyse import pixel_bandwidth_hz

    vm = make(extra="detector_noise_uv_per_rthz = 0.0\n")
    engage(vm)
    n, rate = 128, 1.0
    line = vm.scan_line(y_m=0.0, x_start_m=-1e-6, length_m=2e-6, pixels=n, line_rate_hz=rate,
                        passes=[(200e-9, 0.0)] * 24)
    measured = np.std([p.phase_deg for p in line.passes])  # 3072 values: 1.3 % standard error of an SD
    v = noise_verdict(measured, spring_constant_n_per_m=K, resonance_hz=F0, quality_factor=Q, temperature_k=T,
                      bandwidth_hz=pixel_bandwidth_hz(rate, n), amplitude_m=20e-9)
    # the lock-in's 0.1 ms time constant narrows the stage's bandwidth to 1 / (4 tau + 2 dwell) = 122 Hz of 128
    assert measured / v.thermal_phase_noise_deg == pytest.approx(math.sqrt(122.0 / 128.0), rel=0.05)
    assert v.verdict == "thermal_limit"


def test_approach_stops_at_the_setpoint():
    vm = make()
    vm.set_drive(F0, 0.2)
    free_v = vm.read(["amplitude_v"])["amplitude_v"]
    assert free_v == pytest.approx(20e-9 * vm.volts_per_m, rel=0.01)
    setpoint = engage(vm)
    r = vm.read(["amplitude_v", "z_m"])
    assert r["amplitude_v"] == pytest.approx(setpoint, rel=0.02)
    assert 0 < r["z_m"] < vm.limits.z_range_m
    assert vm.status().engaged


def test_topography_tracking_error_grows_with_line_rate():
    sample = FlatSample(height_m=5e-9, height_period_m=400e-9)
    errors = []
    for rate in (0.2, 20.0):
        vm = make(sample, "z_sensor_noise_nm = 0.0\n")
        engage(vm)
        line = vm.scan_line(y_m=0.0, x_start_m=-2e-6, length_m=4e-6, pixels=512, line_rate_hz=rate)
        x = -2e-6 + (np.arange(512) + 0.5) * 4e-6 / 512
        errors.append(np.std(line.topography_m - sample.topography_m(x, 0 * x)))
    assert errors[0] < 0.3e-9  # slow line: the feedback follows 5 nm features within a fraction of a nm
    assert errors[1] > 3 * errors[0]  # finite bandwidth: a fast line lags behind


def test_hard_limits_are_never_crossed():
    vm = make()
    rng = np.random.default_rng(0)
    z_range = vm.limits.z_range_m
    for target in rng.uniform(-z_range, 2 * z_range, 200):
        try:
            vm.move_z(float(target))
        except StageLimitError as exc:
            assert exc.quantity == "z extension" and exc.high == z_range and exc.value == target
        assert 0.0 <= vm.z.position_m <= z_range
    with pytest.raises(StageLimitError, match=r"tip bias = 10.5 V is outside \[-10.0, 10.0\] V"):
        vm.set_bias(10.5)
    assert vm.bias_v == 0.0
    with pytest.raises(StageLimitError, match="drive amplitude"):
        vm.set_drive(F0, 2.5)
    with pytest.raises(StageLimitError, match="sample rate"):
        vm.record_deflection(1000, 6e6)
    with pytest.raises(StageLimitError, match="z extension"):
        vm.force_curve(z_range * 1.01, 100)


def test_lift_beyond_z_range_refused():
    vm = make()
    engage(vm)
    with pytest.raises(StageLimitError, match="z extension"):
        vm.scan_line(y_m=0.0, x_start_m=0.0, length_m=1e-6, pixels=64, line_rate_hz=1.0, passes=[(9.5e-6, 0.0)])


def test_scan_line_needs_engagement():
    vm = make()
    with pytest.raises(StageFault) as info:
        vm.scan_line(y_m=0.0, x_start_m=0.0, length_m=1e-6, pixels=64, line_rate_hz=1.0)
    assert info.value.code == NOT_ENGAGED


def test_withdraw_always_allowed_and_idempotent():
    vm = make()
    vm.withdraw()
    vm.withdraw()
    engage(vm)
    vm.set_bias(2.0)
    vm.set_laser_fraction(0.0)
    with pytest.raises(StageFault) as info:
        vm.read(["amplitude_v"])
    assert info.value.code == LASER_LOST
    assert vm.read(["sum_v"])["sum_v"] < 0.5
    assert "laser lost" in vm.status().faults
    vm.withdraw()
    vm.drive_off()
    vm.set_bias(0.0)
    s = vm.status()
    assert (s.z_m, s.feedback_on, s.drive_on, s.bias_v, s.engaged) == (0.0, False, False, 0.0, False)


def test_tip_exposure_on_every_pass():
    sample = FlatSample()
    vm = make(sample)
    engage(vm)
    vm.scan_line(y_m=0.0, x_start_m=0.0, length_m=1e-6, pixels=64, line_rate_hz=1.0,
                 passes=[(20e-9, 0.0), (50e-9, 1.0)])
    assert sample.exposures == 3  # the first pass, then each second pass in order
    assert [e.shape for e in sample.exposure_log] == [(64,)] * 3
    assert np.all(sample.exposure_log[0] < 1e-9)  # tapping: the closest approach touches the surface
    # closest approach of the second passes: the centre gap (setpoint gap + lift) minus the free amplitude
    free = float(vm.free_amplitude_m())
    d_sp = vm.feedback.setpoint_gap_m(free, vm.feedback.setpoint_v / vm.volts_per_m)
    np.testing.assert_allclose([e.mean() for e in sample.exposure_log[1:]], np.array([20e-9, 50e-9]) + d_sp - free,
                               atol=0.5e-9)


def test_switching_by_one_pass_is_seen_by_the_next():
    vm = build_microscope(load_scenario("low-coercivity"), seed=1)
    engage(vm)
    line = vm.scan_line(y_m=0.0, x_start_m=-1.5e-6, length_m=3e-6, pixels=256, line_rate_hz=1.0,
                        passes=[(15e-9, 0.0), (15e-9, 0.0)])
    # same height twice: the first of them switches pixels of this low-coercivity film, so the repeat differs
    # by more than the noise (about 0.1 deg per pixel)
    assert vm.sample.magnetisation_version >= 2
    assert np.std(line.passes[1].phase_deg - line.passes[0].phase_deg) > 1.0


def test_force_curve_contact_slope_and_adhesion():
    k_s = 300.0
    vm = make(FlatSample(contact_n_per_m=k_s, adhesion_n=5e-9), "detector_noise_uv_per_rthz = 0.0\n")
    engage(vm)
    vm.set_feedback(False)
    z0 = vm.z.position_m
    curve = vm.force_curve(z0 + 120e-9, 2000)
    contact = curve.deflection_v > 0.5
    slope = np.polyfit(curve.z_m[contact], curve.deflection_v[contact], 1)[0]
    # series springs lever + sample: InvOLS_apparent = InvOLS (1 + k/k_s) (elementary; see Butt, Cappella &
    # Kappl 2005, Surf. Sci. Rep. 59, 1 for the practice)
    assert 1 / slope == pytest.approx(50e-9 * (1 + K / k_s), rel=2e-3)
    # adhesion: the retract pulls further negative than the snap-in on approach
    assert curve.retract_deflection_v.min() < curve.deflection_v.min() - 0.002
    assert curve.retract_deflection_v.min() == pytest.approx(-5e-9 / K / 50e-9, rel=0.05)


def test_scan_line_cpu_time():
    vm = make()
    engage(vm)
    passes = [(h * 1e-9, 0.0) for h in (10, 20, 30, 40, 60, 80, 100)]
    vm.scan_line(y_m=0.0, x_start_m=-2e-6, length_m=4e-6, pixels=256, line_rate_hz=1.0, passes=passes)
    t0 = time.process_time()
    for _ in range(30):
        vm.scan_line(y_m=0.0, x_start_m=-2e-6, length_m=4e-6, pixels=256, line_rate_hz=1.0, passes=passes)
    per_line = (time.process_time() - t0) / 30
    assert per_line < 5e-3, f"{per_line * 1e3:.2f} ms per 256-pixel line with 7 second passes"


def sho_volts(f, b, a0, f0, q):
    """First-mode oscillator plus white background (e.g. Cook et al. 2006, Nanotechnology 17, 2135)."""
    return b + a0 / ((1 - (f / f0) ** 2) ** 2 + (f / (f0 * q)) ** 2)


def test_recorded_spectrum_fit_reads_back_the_scenario():
    text = BASE.replace("2.8", "2.2").replace("width_um = 34.65", "") + "flicker_uv_per_rthz_at_1hz = 0.0\n"
    scenario = Scenario.from_text(text.replace("temperature_k = 298.15", "temperature_k = 305.0"))
    vm = build_microscope(scenario, seed=11, sample=FlatSample())
    fs, seconds = 500e3, 8.0
    v = np.concatenate(list(vm.record_deflection(int(fs * seconds), fs)))
    nperseg = 1 << 14  # 30.5 Hz bins, 12 per FWHM
    f, p = welch(v, fs, window="hann", nperseg=nperseg)
    sel = (f > F0 - 4000) & (f < F0 + 4000)
    p0 = [p[sel].min(), p[sel].max() / Q**2, F0 * 1.001, Q * 0.9]
    popt, _ = curve_fit(sho_volts, f[sel], p[sel], p0=p0)
    # frozen weights from the model, refit (converges to the maximum-likelihood estimate; Norrelykke &
    # Flyvbjerg 2010, Rev. Sci. Instrum. 81, 075103)
    for _ in range(3):
        popt, _ = curve_fit(sho_volts, f[sel], p[sel], p0=popt, sigma=sho_volts(f[sel], *popt))
    b, a0, f0, q = popt
    mean_square_v = a0 * math.pi * q * f0 / 2
    k = 0.817434 * KB * 305.0 / ((50e-9) ** 2 * mean_square_v)  # Butt & Jaschke 1995 optical-lever factor
    rel_sd = math.sqrt(Q / (math.pi * F0 * seconds))  # 1.0 % for this record
    assert k == pytest.approx(2.2, rel=4 * rel_sd)
    assert f0 == pytest.approx(F0, rel=1e-4)
    assert q == pytest.approx(Q, rel=4 * 2 * rel_sd)
    assert b == pytest.approx((2e-6) ** 2, rel=0.1)  # the detector's white density


def real_line(name, heights, seed=1):
    vm = build_microscope(load_scenario(name), seed=seed)
    engage(vm)
    seen = []
    original = vm.sample.interaction

    def spy(*args, **kwargs):
        result = original(*args, **kwargs)
        seen.append(np.asarray(result.force_gradient_n_per_m))
        return result

    vm.sample.interaction = spy
    line = vm.scan_line(y_m=0.0, x_start_m=-1.5e-6, length_m=3e-6, pixels=256, line_rate_hz=1.0,
                        passes=[(h, 0.0) for h in heights])
    return vm, line, seen[-1]


def test_real_sample_phase_dark_where_attractive():
    vm, line, fprime = real_line("default", [20e-9, 50e-9])
    offset = vm.config.phase_offset_deg
    for p, g in zip(line.passes, fprime):
        phase = p.phase_deg - offset
        expected = -np.degrees(np.arctan2(Q * g / K, 1.0))  # -(lag - 90) at the free resonance, k = 2.8, Q = 200
        # the lock-in and amplitude response smooth along the line; compare after the same scale of smoothing
        resid = phase - expected
        assert np.std(resid) < 0.35 * np.std(expected) + 0.1
        strong = np.abs(g) > 3 * np.median(np.abs(g - np.median(g)))
        assert np.all(np.sign(phase[strong & (np.abs(expected) > 0.5)]) == -np.sign(g[strong & (np.abs(expected) > 0.5)]))


@pytest.mark.parametrize("name", ["default", "inplane-bits", "dot-array", "soft-film", "low-coercivity",
                                  "charged-patch"])
def test_builtin_scenarios_scan(name):
    vm, line, _ = real_line(name, [20e-9, 60e-9])
    assert np.all(np.isfinite(line.topography_m))
    for p in line.passes:
        assert np.all(np.isfinite(p.phase_deg)) and np.all(np.isfinite(p.amplitude_v))
    # the magnetic and electrostatic signal decays with lift height
    assert np.std(line.passes[0].phase_deg) > np.std(line.passes[1].phase_deg) * 0.9


def test_drift_moves_the_image_between_lines():
    vm = make(FlatSample(stripe_n_per_m=2e-3, period_m=1e-6), "drift_x_nm_per_s = 10.0\n")
    engage(vm)

    def profile():
        line = vm.scan_line(y_m=0.0, x_start_m=-2e-6, length_m=4e-6, pixels=1000, line_rate_hz=1.0,
                            passes=[(30e-9, 0.0), (60e-9, 0.0)])
        return line.passes[0].phase_deg - line.passes[0].phase_deg.mean()

    first = profile()
    for _ in range(9):
        profile()
    last = profile()
    lags = np.arange(-150, 151)
    corr = [np.dot(first[150:-150], np.roll(last, -lag)[150:-150]) for lag in lags]
    # 10 lines later, 3 s each (first pass + 2 second passes at 1 Hz): 10 nm/s * 30 s = 300 nm = 75 px;
    # a feature at sample x appears at commanded x - v t, so the pattern moves towards -x
    assert lags[int(np.argmax(corr))] == pytest.approx(-75, abs=2)


def test_realtime_pace_streams_at_the_signal_rate():
    from simulated_stage.clock import VirtualClock

    wall = {"t": 0.0, "slept": 0.0}

    def sleep(s):
        wall["t"] += s
        wall["slept"] += s

    clock = VirtualClock("realtime", monotonic=lambda: wall["t"], sleep=sleep)
    vm = build_microscope(Scenario.from_text(BASE), seed=1, sample=FlatSample(), clock=clock)
    n = sum(c.size for c in vm.record_deflection(250_000, 500e3, chunk=50_000))
    assert n == 250_000 and wall["slept"] == pytest.approx(0.5)


def test_feedback_without_setpoint_refused():
    vm = make()
    vm.set_drive(F0, 0.2)
    with pytest.raises(StageFault, match="setpoint"):
        vm.set_feedback(True)
    assert not vm.feedback.on and vm.z.position_m == 0.0


def test_coarse_step_into_the_surface_is_a_crash():
    from simulated_stage.errors import TIP_CRASH

    vm = make()
    engage(vm)
    vm.set_feedback(False)
    with pytest.raises(StageFault) as info:
        vm.step_coarse(10)  # 500 nm towards the sample with Z held: the tip is driven into the surface
    assert info.value.code == TIP_CRASH and "centre gap" in str(info.value)
    assert any("crash" in f for f in vm.status().faults)
    vm.withdraw()  # still allowed
    assert vm.z.position_m == 0.0


def test_excessive_gain_is_reported_as_unstable_feedback():
    vm = make()
    engage(vm)
    vm.set_feedback(True, p_gain=5.0, i_gain=1e7)
    line = vm.scan_line(y_m=0.0, x_start_m=0.0, length_m=1e-6, pixels=64, line_rate_hz=1.0)
    assert "feedback unstable" in vm.status().faults
    assert np.all(np.isfinite(line.topography_m))


@pytest.mark.parametrize("rate_hz", [0.05, 1.0, 10.0, 100.0])
@pytest.mark.parametrize("pixels", [64, 512, 4096])
def test_default_feedback_is_stable(rate_hz, pixels):
    vm = make()
    engage(vm)
    free = float(vm.free_amplitude_m())
    d_sp = vm.feedback.setpoint_gap_m(free, vm.feedback.setpoint_v / vm.volts_per_m)
    slope = vm.feedback.gap_slope(free, d_sp)
    dt = 0.5 / (rate_hz * pixels * vm.config.servo_oversample)
    _, _, den = vm.feedback.loop(dt, slope, amplitude_time_s=vm.lockin.amplitude_time_s,
                                  lockin_time_constant_s=vm.lockin.time_constant_s)
    assert np.max(np.abs(np.roots(den))) < 1.0


@pytest.mark.parametrize("i_gain", [1e3, 1e4, 3e4, 1e5])
def test_discrete_loop_stability_agrees_with_routh_hurwitz(i_gain):
    # The continuous loop has the characteristic polynomial a3 s^3 + a2 s^2 + a1 s + a0 with
    # a3 = tau_a tau_l, a2 = tau_a + tau_l, a1 = 1 + g kp, a0 = g ki; it is stable iff a2 a1 > a3 a0
    # (Routh-Hurwitz, textbook). The zero-order-hold discretisation must agree at any sample interval.
    vm = make()
    engage(vm)
    vm.set_feedback(True, i_gain=i_gain)
    g, kp = 0.5, vm.feedback.p_gain
    tau_a, tau_l = 2 * Q / (2 * math.pi * F0), vm.lockin.time_constant_s
    stable = (tau_a + tau_l) * (1 + g * kp) > tau_a * tau_l * g * i_gain
    for dt in (1e-6, 1e-4, 1e-2):
        _, _, den = vm.feedback.loop(dt, g, amplitude_time_s=tau_a, lockin_time_constant_s=tau_l)
        assert (np.max(np.abs(np.roots(den))) < 1.0) == stable

