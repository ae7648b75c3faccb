"""Scenario files: validation names the key and range; built-ins resolve by name; faults kept raw."""

import math

import pytest

from simulated_stage.errors import ScenarioError
from simulated_stage.lever import air, sader_spring_constant
from simulated_stage.scenario import (LeverWarning, Scenario, build_microscope, builtin_scenarios,
                                      load_scenario)

REQUIRED_PROBE = ("spring_constant_n_per_m", "resonance_hz", "quality_factor", "invols_nm_per_v", "length_um",
                  "width_um")


def test_builtins_resolve_and_set_the_required_keys():
    names = builtin_scenarios()
    assert set(names) >= {"default", "inplane-bits", "dot-array", "soft-film", "low-coercivity", "charged-patch"}
    import tomllib
    for name in names:
        sc = load_scenario(name)
        assert sc.name == name and sc.description
        doc = tomllib.loads(sc.text)
        assert all(k in doc["probe"] for k in REQUIRED_PROBE) and "temperature_k" in doc["environment"]
        lever = sc.lever()
        assert lever.warnings == ()  # built-in levers obey the Sader theory
        assert abs(lever.sader_mismatch) < 5e-4


def test_default_scenario_has_a_contact_potential_of_a_few_hundred_mv():
    sc = load_scenario("default")
    assert sc.sample.pattern == "oop_tracks" and 0.1 <= sc.sample.cpd_v <= 0.6


def test_scenario_from_file(tmp_path):
    path = tmp_path / "mine.toml"
    path.write_text('name = "mine"\n[probe]\nlength_um = 200.0\nwidth_um = 30.0\nthickness_um = 2.5\n')
    sc = load_scenario(str(path))
    assert sc.name == "mine" and sc.source == str(path)
    assert sc.lever().thickness_m == pytest.approx(2.5e-6)


def test_missing_scenario_names_builtins():
    with pytest.raises(ScenarioError, match="default"):
        load_scenario("no-such-scenario")


@pytest.mark.parametrize("text, needle", [
    ("[probe]\nspring_constant = 2.0\n", "unknown key 'spring_constant'"),
    ("[probes]\n", "unknown scenario table or key 'probes'"),
    ("[probe]\nquality_factor = 0.2\n", r"quality_factor = 0.2 is outside the allowed range \[1, 100000\]"),
    ("[environment]\ntemperature_k = 1000\n", r"temperature_k = 1000 is outside the allowed range \[200, 400\]"),
    ("[instrument]\nz_range_um = -1\n", r"\[instrument\] z_range_um = -1 is outside"),
    ("[instrument]\nservo_oversample = 2.5\n", "servo_oversample = 2.5 must be an integer"),
    ("[probe]\nmaterial = \"gold\"\n", "material = 'gold' must be one of"),
    ("[probe]\ninvols_nm_per_v = \"50\"\n", "must be a number"),
    ("[sample]\npattern = \"plaid\"\n", "pattern"),
    ("[tip]\nradius_nm = 0.0\n", "radius_nm"),
    ("[probe\n", "not valid TOML"),
])
def test_invalid_values_name_key_and_range(text, needle):
    with pytest.raises(ScenarioError, match=needle):
        Scenario.from_text(text)


def test_faults_table_is_kept_raw():
    sc = Scenario.from_text('[faults]\nseed = 3\n[[faults.events]]\nkind = "laser_loss"\nafter = 5\n')
    assert sc.faults == {"seed": 3, "events": [{"kind": "laser_loss", "after": 5}]}


def test_width_derived_when_not_given():
    sc = Scenario.from_text("[probe]\nspring_constant_n_per_m = 2.0\nresonance_hz = 70000.0\n"
                            "quality_factor = 180.0\nlength_um = 225.0\n[environment]\ntemperature_k = 300.0\n")
    lever = sc.lever()
    assert sader_spring_constant(225e-6, lever.width_m, 70e3, 180.0, air(300.0)) == pytest.approx(2.0, rel=1e-9)


def test_inconsistent_probe_warns_with_the_size_of_the_disagreement():
    text = ("[probe]\nspring_constant_n_per_m = 2.8\nresonance_hz = 75000.0\nquality_factor = 200.0\n"
            "length_um = 225.0\nwidth_um = 30.0\n")
    sc = Scenario.from_text(text)
    expected = sader_spring_constant(225e-6, 30e-6, 75e3, 200.0, air(298.15)) / 2.8 - 1
    assert abs(expected) > 0.005
    with pytest.warns(LeverWarning, match=f"{expected * 100:+.2f} %"):
        from tests.simulated_stage.fake_sample import FlatSample
        build_microscope(sc, sample=FlatSample())


def test_start_gap_must_be_reachable():
    with pytest.raises(ScenarioError, match="start_gap_um"):
        Scenario.from_text("[instrument]\nstart_gap_um = 3000\ncoarse_travel_mm = 2.0\n")


def test_instrument_units_converted_to_si():
    sc = Scenario.from_text("[instrument]\nz_range_um = 12.0\nlockin_time_constant_ms = 0.5\n"
                            "drift_x_nm_per_s = 0.5\n[probe]\ninvols_nm_per_v = 40.0\n")
    cfg = sc.instrument_config()
    assert cfg.limits.z_range_m == 12e-6 and cfg.lockin_time_constant_s == 5e-4
    assert cfg.drift_m_per_s == (0.5e-9, 0.0) and cfg.detector.invols_m_per_v == 40e-9
    assert math.isfinite(cfg.limits.coarse_step_m)
