"""Fault plans (parsing, validation, scheduling, seeded random draws) and the stage proxy that injects NaN
readings, laser loss, Z jumps and controller error codes; also through the simulated controller."""

from __future__ import annotations

import ast
import errno
import math
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

sys.path.insert(0, str(Path(__file__).parent))
from link_fakes import FakeController, ToyStage  # noqa: E402

from drivers.errors import ControllerFault, LaserLost  # noqa: E402
from drivers.fault_plan import STAGE_KINDS, FaultPlan  # noqa: E402
from drivers.link_faults import gate_for  # noqa: E402
from simulated_stage.errors import LASER_LOST, Z_JUMP_CODE, ScenarioError, StageFault  # noqa: E402
from simulated_stage.faults import FaultyStage  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]

TABLE = tomllib.loads("""
[faults]
seed = 7
[[faults.events]]
kind = "laser_loss"
after = 12
[[faults.events]]
kind = "delay"
probability = 0.25
delay_s = 0.2
""")["faults"]


def test_plan_from_a_scenario_table_and_from_options_agree():
    a = FaultPlan.from_table(TABLE)
    b = FaultPlan.from_specs(["laser_loss:after=12", "delay:probability=0.25:delay_s=0.2"], seed=7)
    assert a == b and a.faults[1].delay_s == 0.2


@pytest.mark.parametrize("table,key", [
    ({"events": [{"kind": "meteor", "after": 1}]}, "kind"),
    ({"events": [{"kind": "delay"}]}, "'after'"),
    ({"events": [{"kind": "delay", "after": 1, "probability": 0.5}]}, "'after'"),
    ({"events": [{"kind": "delay", "probability": 1.5}]}, "probability"),
    ({"events": [{"kind": "delay", "after": 1, "delay_s": -1}]}, "delay_s"),
    ({"events": [{"kind": "delay", "after": 1.5}]}, "after"),
    ({"events": [{"kind": "delay", "after": 1, "colour": "red"}]}, "colour"),
    ({"seed": -1}, "seed"), ({"sead": 1}, "sead"), ({"events": [{"after": 1}]}, "kind"),
])
def test_invalid_plans_name_the_key(table, key):
    with pytest.raises(ScenarioError, match=key):
        FaultPlan.from_table(table)


def test_method_lists_in_option_strings():
    (fault,) = FaultPlan.from_specs(["error_code:after=3:methods=read+move_z"]).faults
    assert fault.methods == ("read", "move_z")


def test_bad_option_strings():
    with pytest.raises(ScenarioError, match="key=value"):
        FaultPlan.from_specs(["timeout:after"])
    with pytest.raises(ScenarioError, match="not a number"):
        FaultPlan.from_specs(["timeout:after=soon"])


def test_scheduled_fault_fires_once_on_call_after_plus_one():
    sched = FaultPlan.from_specs(["timeout:after=3"]).schedule()
    fired = [bool(sched.next_call()) for _ in range(10)]
    assert fired == [False, False, False, True] + [False] * 6


def test_random_faults_are_seeded_and_have_their_rate():
    plan = FaultPlan.from_specs(["corrupt_reply:probability=0.1"], seed=3)
    draws = [[bool(s.next_call()) for _ in range(5000)] for s in (plan.schedule(), plan.schedule())]
    assert draws[0] == draws[1]  # same seed, same faults
    hits = sum(draws[0])
    # two-sided binomial test at the 1e-4 level (a fixed seed makes it deterministic anyway)
    assert stats.binomtest(hits, 5000, 0.1).pvalue > 1e-4
    other = FaultPlan.from_specs(["corrupt_reply:probability=0.1"], seed=4).schedule()
    assert [bool(other.next_call()) for _ in range(5000)] != draws[0]


def _toy(specs, seed=0):
    stage = ToyStage()
    return stage, FaultyStage(stage, FaultPlan.from_specs(specs, seed=seed).schedule(STAGE_KINDS))


def test_nan_reading_hits_one_call():
    _, proxy = _toy(["nan_reading:after=1:nan_fraction=0.25"])
    assert proxy.read(["amplitude_v"]) == {"amplitude_v": 0.3}
    assert math.isnan(proxy.read(["amplitude_v"])["amplitude_v"])
    assert proxy.read(["amplitude_v"]) == {"amplitude_v": 0.3}
    _, proxy = _toy(["nan_reading:after=0:nan_fraction=0.25"])
    line = proxy.scan(40, [(20e-9, 0.0)])
    assert np.isnan(line["topography_m"]).sum() == 10
    assert not np.isnan(proxy.scan(40, [(20e-9, 0.0)])["topography_m"]).any()


def test_laser_loss_raises_and_persists_until_restored_but_safety_calls_work():
    stage, proxy = _toy(["laser_loss:after=2"])
    proxy.set_feedback(True)
    proxy.set_bias(3.0)
    with pytest.raises(StageFault) as err:
        proxy.read(["sum_v"])
    assert err.value.code == LASER_LOST and "sum" in str(err.value)
    with pytest.raises(StageFault):
        proxy.move_z(1e-6)
    proxy.withdraw()
    proxy.drive_off()
    proxy.set_bias(0.0)  # zero bias never faults
    assert (stage.z_m, stage.bias_v, stage.feedback) == (0.0, 0.0, False)
    proxy.restore_laser()
    assert proxy.read(["sum_v"]) == {"sum_v": 3.0}


def test_laser_loss_uses_the_stage_own_laser_model_when_it_has_one():
    class LaserStage(ToyStage):
        fraction = 1.0

        def set_laser_fraction(self, f):
            self.fraction = f

        def read(self, channels):
            out = super().read(channels)
            if "sum_v" in out:
                out["sum_v"] *= self.fraction
            return out

    stage = LaserStage()
    proxy = FaultyStage(stage, FaultPlan.from_specs(["laser_loss:after=0"]).schedule(STAGE_KINDS))
    with pytest.raises(StageFault):
        proxy.read(["sum_v"])
    assert stage.fraction == pytest.approx(0.02)
    assert proxy.read(["sum_v"])["sum_v"] == pytest.approx(0.06)  # the stage itself now shows the drop
    proxy.restore_laser()
    assert stage.fraction == 1.0


def test_z_jump_offsets_z_and_topography_and_is_reported():
    _, proxy = _toy(["z_jump:after=0:z_jump_m=4e-8"])
    with pytest.raises(StageFault) as err:
        proxy.read(["z_m"])
    assert err.value.code == Z_JUMP_CODE and "40 nm" in str(err.value)
    assert proxy.read(["z_m"])["z_m"] == pytest.approx(4e-8)
    assert proxy.scan(8, [])["topography_m"] == pytest.approx(1e-9 * np.sin(6 * np.linspace(0, 1, 8)) + 4e-8)


def test_error_code_and_method_filter():
    stage, proxy = _toy(["error_code:after=1:code=333:methods=move_z"])
    proxy.read(["z_m"])
    proxy.move_z(1e-6)
    proxy.read(["z_m"])
    with pytest.raises(StageFault) as err:
        proxy.move_z(2e-6)
    assert err.value.code == 333 and stage.z_m == 1e-6  # the faulting call did nothing


def test_fake_controller_maps_stage_faults():
    _, proxy = _toy(["laser_loss:after=0"])
    with pytest.raises(LaserLost):
        FakeController(proxy).read(["sum_v"])
    _, proxy = _toy(["error_code:after=0"])
    with pytest.raises(ControllerFault):
        FakeController(proxy).move_z(1e-6)


def test_disk_gate_fills_on_schedule():
    gate = gate_for(FaultPlan.from_specs(["disk_full:after=2", "delay:after=0"]))
    gate.check(10)
    gate.check(10)
    with pytest.raises(OSError) as err:
        gate.check(10)
    assert err.value.errno == errno.ENOSPC
    with pytest.raises(OSError):
        gate.check(1)  # and stays full


def test_faults_module_imports_nothing_of_ours_but_the_stage():
    tree = ast.parse((ROOT / "simulated_stage" / "faults.py").read_text())
    names = {n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)} | {
        a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    assert not any(str(m).startswith(("drivers", "assistant")) for m in names)


def test_proxy_around_the_simulated_stage_through_the_simulated_controller():
    pytest.importorskip("drivers.simulated")
    from drivers.simulated import SimulatedController
    from simulated_stage.scenario import build_microscope, load_scenario

    scenario = load_scenario("default")
    stage = build_microscope(scenario, seed=1)
    plan = FaultPlan.from_specs(["nan_reading:after=0", "laser_loss:after=2"])
    sim = SimulatedController(FaultyStage(stage, plan.schedule(STAGE_KINDS)), scenario=scenario, seed=1)
    first = sim.read(["sum_v", "amplitude_v"])
    assert math.isnan(first["amplitude_v"]) and first["sum_v"] > 0.5
    assert math.isfinite(sim.read(["amplitude_v"])["amplitude_v"])
    with pytest.raises(LaserLost):
        sim.read(["sum_v"])
    sim.make_safe()
    status = sim.status()
    assert status.safe and "laser lost" in status.faults
