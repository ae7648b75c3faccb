"""Calibration on the simulated stage recovers the scenario's lever.

The scenario's k, f0, Q and InvOLS are the truth the simulator was built from; the procedure never sees them.
What is checked is the published methods applied to the simulated measurement: the Sader method (Sader, Chon &
Mulvaney 1999, Rev. Sci. Instrum. 70, 3967), the thermal method with the Butt-Jaschke optical-lever factor 0.817
(Butt & Jaschke 1995, Nanotechnology 6, 1) and the non-contact sensitivity of Higgins et al. 2006 (Rev. Sci.
Instrum. 77, 013701).
"""

from __future__ import annotations

import tomllib
from importlib import resources

import pytest

from assistant.procedures.calibrate import CalibrationError, CalibrationSettings, calibrate
from drivers.registry import open_controller

SCENARIO = tomllib.loads(resources.files("simulated_stage").joinpath("scenarios/default.toml").read_text())
TRUE_K = SCENARIO["probe"]["spring_constant_n_per_m"]
TRUE_INVOLS_M_PER_V = SCENARIO["probe"]["invols_nm_per_v"] * 1e-9
TRUE_F0 = SCENARIO["probe"]["resonance_hz"]
TRUE_Q = SCENARIO["probe"]["quality_factor"]
ROOM_K = SCENARIO["environment"]["temperature_k"]  # what the lab thermometer reads


@pytest.fixture(scope="module")
def noncontact():
    with open_controller("sim://", seed=11) as ctl:
        result = calibrate(ctl, CalibrationSettings(temperature_k=ROOM_K, thermal_seconds=2.0))
        assert ctl.status().safe
    return result


def test_sader_k_within_its_stated_uncertainty(noncontact):
    r = noncontact
    assert r.k_source == "Sader method"
    assert abs(r.k_n_per_m - TRUE_K) <= 2 * r.k_std_n_per_m
    assert r.k_std_n_per_m / r.k_n_per_m < 0.06  # plan view 1 %/2 %, Q 2-3 %: a few percent in all


def test_noncontact_invols_within_3_percent(noncontact):
    r = noncontact
    assert "non-contact" in r.invols_source
    assert r.invols_m_per_v == pytest.approx(TRUE_INVOLS_M_PER_V, rel=0.03)
    # there is only one k on this path: the thermal spectrum was spent on InvOLS
    assert r.thermal_k_check is None


def test_resonance_and_q(noncontact):
    r = noncontact
    assert abs(r.thermal.f0_hz - TRUE_F0) < 5 * r.thermal.f0_std_hz + 1.0
    assert abs(r.thermal.q - TRUE_Q) < 3 * r.thermal.q_std
    assert abs(r.sweep.q - TRUE_Q) < 3 * r.sweep.q_std


def test_drive_gives_the_requested_free_amplitude(noncontact):
    d = noncontact.drive
    assert d.free_amplitude_m == pytest.approx(20e-9, rel=0.05)
    assert d.setpoint_v == pytest.approx(0.7 * d.free_amplitude_v, rel=1e-9)


def test_the_phase_reference_comes_with_its_standard_error(noncontact):
    # every pass has the reference subtracted, so its error is an offset of every image; the standard error of
    # the averaged readings goes with it. A free lever's lock-in phase scatters by the thermal limit (Albrecht,
    # Gruetter, Horne & Rugar 1991) in the read's bandwidth, 1 / (4 tau) for a first-order low-pass, for the
    # stage's 0.1 ms: Q dF'/k with dF' = sqrt(4 k kB T B / (w0 Q A^2 / 2)), over the square root of the reads
    import math

    from assistant.procedures.calibrate import REFERENCE_READS

    d = noncontact.drive
    kb, bandwidth = 1.380649e-23, 1.0 / (4 * 1e-4)
    dfp = math.sqrt(4 * TRUE_K * kb * ROOM_K * bandwidth / (2 * math.pi * TRUE_F0 * TRUE_Q * d.free_amplitude_m**2 / 2))
    per_read_deg = math.degrees(TRUE_Q * dfp / TRUE_K)
    # measured 0.00713 deg against 0.00716 (the detector's white noise is small beside the thermal motion at
    # resonance); a standard deviation from 2000 reads scatters by 1.6 %
    assert d.phase_reference_std_deg == pytest.approx(per_read_deg / math.sqrt(REFERENCE_READS), rel=0.1)
    assert noncontact.summary()["phase_reference_std_deg"] == d.phase_reference_std_deg


def test_contact_invols_makes_thermal_k_an_independent_check():
    with open_controller("sim://", seed=12) as ctl:
        r = calibrate(ctl, CalibrationSettings(temperature_k=ROOM_K, contact_invols=True))
        assert ctl.status().safe  # withdrawn after the force curve
    assert r.invols_source.startswith("force curve")
    assert r.invols_m_per_v == pytest.approx(TRUE_INVOLS_M_PER_V, rel=0.02)
    check = r.thermal_k_check
    assert check is not None and check["agree"]
    assert abs(check["k_n_per_m"] - TRUE_K) <= 2 * check["k_std_n_per_m"]
    assert any("wears the magnetic coating" in n for n in r.notices)


def test_no_route_to_k_is_a_clear_error():
    with open_controller("sim://", seed=13) as ctl:
        ctl.probe_hint = lambda: None  # a controller that knows nothing of its probe
        with pytest.raises(CalibrationError, match="--length-um"):
            calibrate(ctl, CalibrationSettings(temperature_k=ROOM_K, thermal_seconds=0.5))
        assert ctl.status().safe


class _Recording:
    """The controller, with a list of the calls that would move the stage or drive the lever."""

    def __init__(self, ctl):
        self._ctl, self.calls = ctl, []

    def __getattr__(self, name):
        attr = getattr(self._ctl, name)
        if name in ("set_drive", "sweep", "record_deflection", "read", "coarse_step", "make_safe", "withdraw"):
            def recorded(*a, **kw):
                self.calls.append(name)
                return attr(*a, **kw)
            return recorded
        return attr


def test_a_sweep_drive_above_the_software_limit_is_refused_before_anything_runs():
    # the software drive limit (common practice, no source): a 10 mV sweep with a 5 mV limit ran in full before
    from assistant.procedures.guard import SafetyError, SafetyLimits

    with open_controller("sim://", seed=14) as ctl:
        rec = _Recording(ctl)
        with pytest.raises(SafetyError, match="sweep drive 10 mV exceeds the software drive limit 5 mV"):
            calibrate(rec, CalibrationSettings(temperature_k=ROOM_K, thermal_seconds=0.5, sweep_drive_v=0.01),
                      limits=SafetyLimits(drive_amplitude_max_v=0.005))
        assert rec.calls == []
        assert ctl.status().safe
        with pytest.raises(SafetyError, match="controller's drive limit"):
            calibrate(rec, CalibrationSettings(temperature_k=ROOM_K, thermal_seconds=0.5,
                                               sweep_drive_v=2 * ctl.limits.drive_max_v),
                      limits=SafetyLimits(drive_amplitude_max_v=10 * ctl.limits.drive_max_v))
        assert rec.calls == []


def test_a_given_sensitivity_carries_its_own_uncertainty_into_k():
    # k = kB T / (chi^2 InvOLS^2 A): to first order (k_std / k)^2 gains (2 InvOLS_std / InvOLS)^2 (standard
    # propagation of a power law). The same seed gives the same thermal fit, so between two stated sensitivity
    # errors only that term changes.
    def k_check(std_nm_per_v):
        with open_controller("sim://", seed=14) as ctl:
            r = calibrate(ctl, CalibrationSettings(temperature_k=ROOM_K, thermal_seconds=0.5, invols_m_per_v=50e-9,
                                                   invols_std_m_per_v=std_nm_per_v * 1e-9))
            assert ctl.status().safe
        assert r.invols_std_m_per_v == pytest.approx(std_nm_per_v * 1e-9)
        return r.thermal_k_check["k_n_per_m"], r.thermal_k_check["k_std_n_per_m"]

    (k1, s1), (k2, s2) = k_check(1.0), k_check(2.5)
    assert k1 == k2
    assert (s2 / k2) ** 2 - (s1 / k1) ** 2 == pytest.approx(4 * (2.5**2 - 1.0**2) / 50.0**2, rel=1e-9)


def test_a_sensitivity_error_must_be_finite_and_positive():
    with pytest.raises(CalibrationError, match="invols_std_m_per_v"):
        CalibrationSettings(invols_m_per_v=50e-9, invols_std_m_per_v=float("inf")).validate()


def test_an_assumed_temperature_widens_the_errors():
    # with no thermometer the air is taken at 295.15 K +- 3 K (common practice, no source) and both k routes carry
    # it: the Sader k through the air's properties, the thermal k as (sigma_T / T)^2 (standard propagation)
    with open_controller("sim://", seed=15) as ctl:
        hint = ctl.probe_hint()
        ctl.probe_hint = lambda: {k: v for k, v in hint.items() if k != "temperature_k"}
        r = calibrate(ctl, CalibrationSettings(thermal_seconds=0.5, invols_m_per_v=50e-9))
        assert ctl.status().safe
    assert r.sader.temperature_std_k == 3.0 and r.thermal.temperature_k == 295.15
    assert r.summary()["temperature_std_k"] == 3.0  # what the session keeps for a later reanalysis
    assert any("assumed (± 3 K in the errors)" in n for n in r.notices)
    rel = r.thermal.k_std_n_per_m / r.thermal.k_n_per_m
    area = r.thermal.peak_area_std_v2 / r.thermal.peak_area_v2
    assert rel**2 == pytest.approx(area**2 + (2 * 0.02) ** 2 + (3.0 / 295.15) ** 2, rel=1e-9)
