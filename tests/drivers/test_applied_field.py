"""The applied-field capability through the whole controller layer: the interface's promises, the simulated
driver, the command table, the server's own limit checks and both links."""

from __future__ import annotations

import math
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
from link_fakes import FakeController, ThreadServer, connect  # noqa: E402

from drivers.base import Capability, Limits  # noqa: E402
from drivers.errors import CapabilityMissing, LimitExceeded  # noqa: E402
from drivers.registry import open_controller  # noqa: E402
from drivers.fault_plan import Fault, FaultPlan  # noqa: E402
from drivers.server.dispatch import Dispatcher, Session  # noqa: E402
from drivers.wire.checks import check_limits, check_types  # noqa: E402
from drivers.wire.commands import command, ramp_s  # noqa: E402
from simulated_stage.faults import FaultyStage  # noqa: E402

LIM = Limits(field_max_a_per_m=500e3, field_ramp_a_per_m_per_s=50e3, field_settle_s=1.0)


class MagnetController(FakeController):
    """A controller with a magnet that checks nothing itself: only the server stands in the way."""

    def __init__(self) -> None:
        super().__init__()
        self.limits = LIM
        self.field = 0.0
        self.set_calls: list[float] = []

    def set_field(self, field_a_per_m):
        self.set_calls.append(field_a_per_m)
        self.field = field_a_per_m

    def read_field(self):
        return self.field


def test_zero_field_is_always_allowed_and_others_need_the_capability():
    ctl = FakeController()
    ctl.capabilities = frozenset(Capability) - {Capability.APPLIED_FIELD}
    ctl.set_field(0.0)
    with pytest.raises(CapabilityMissing, match="applied_field"):
        ctl.set_field(1e3)
    with pytest.raises(CapabilityMissing):
        ctl.read_field()
    ctl.make_safe()  # no magnet: nothing about a field to do


def test_make_safe_brings_the_field_to_zero():
    ctl = MagnetController()
    ctl.set_field(300e3)
    ctl.make_safe()
    assert ctl.field == 0.0 and ctl.set_calls[-1] == 0.0


@pytest.mark.parametrize("value", [500.001e3, -600e3, math.nan, math.inf])
def test_field_beyond_the_magnet_is_refused_by_the_command_table(value):
    cmd = command("MAGNet:FIELd")
    with pytest.raises(LimitExceeded, match="field_a_per_m"):
        check_limits(cmd, check_types(cmd, (value,)), LIM)
    check_limits(cmd, (-500e3,), LIM)
    assert cmd.safe_to_repeat and cmd.capability is Capability.APPLIED_FIELD
    assert ramp_s(LIM, -500e3, 500e3) == pytest.approx(2 * 500e3 / 50e3 + 1.0) and ramp_s(LIM, 1.0, 1.0) == 0.0
    assert ramp_s(LIM, 0.0, value) == 0.0  # refused before anything is set: a client waits for no ramp (NaN: none)


def test_server_refuses_out_of_range_fields_before_the_controller_sees_them():
    fake = MagnetController()
    d, s = Dispatcher(fake, watchdog_s=None), Session()
    for text in ("MAGN:FIEL 500001", "MAGN:FIEL -1e9", "MAGN:FIEL NAN", "MAGNET:FIELD INF"):
        assert d.handle_line(text.encode(), s) is None
        code, message = s.errors.pop()
        assert code == -222 and "outside the allowed range" in message, (text, message)
    assert fake.set_calls == []
    d.handle_line(b"MAGN:FIEL -250000", s)
    assert s.errors.pop()[0] == 0 and fake.field == -250e3
    assert d.handle_line(b"MAGN:FIEL?", s).strip() == b"-250000.0"
    d.handle_line(b"SYST:SAFE", s)
    assert fake.field == 0.0


@pytest.mark.parametrize("transport", ["serial", "zmq"])
def test_both_links_carry_the_field_and_the_limits(transport):
    fake = MagnetController()
    with ThreadServer(fake, transport=transport, watchdog_s=None, poll_s=0.005) as server:
        client = connect(server.announcement, timeout_s=2.0)
        try:
            assert client.has(Capability.APPLIED_FIELD)
            assert client.limits.field_max_a_per_m == 500e3 and client.limits.field_settle_s == 1.0
            client.set_field(-123e3)
            assert fake.field == -123e3 and client.read_field() == -123e3
            with pytest.raises(LimitExceeded) as err:
                client.set_field(700e3)
            assert err.value.high == 500e3 and fake.field == -123e3
            client.make_safe()
            assert fake.field == 0.0
        finally:
            client.close()


def test_simulated_driver_has_a_magnet_unless_the_scenario_has_none(tmp_path):
    with open_controller("sim://", scenario="dot-loop") as ctl:
        assert ctl.has(Capability.APPLIED_FIELD) and ctl.limits.field_max_a_per_m == 600e3
        t0 = ctl.stage.clock.now_s
        ctl.set_field(-300e3)
        assert ctl.stage.clock.now_s - t0 == pytest.approx(300e3 / 100e3 + 1.0)
        assert ctl.read_field() == pytest.approx(-300e3, abs=500)
        with pytest.raises(LimitExceeded, match="applied field"):
            ctl.set_field(-601e3)
        ctl.make_safe()
        assert ctl.stage.magnet.field_a_per_m == 0.0 and ctl.status().safe
    text = Path(__file__).parents[2].joinpath("simulated_stage/scenarios/default.toml").read_text()
    scenario = tmp_path / "nomagnet.toml"
    scenario.write_text(text.replace("[instrument]", "[instrument]\nmagnet_max_ka_per_m = 0.0"))
    with open_controller("sim://", scenario=str(scenario)) as ctl:
        assert not ctl.has(Capability.APPLIED_FIELD)
        ctl.make_safe()


def test_injected_faults_never_stop_the_field_going_to_zero():
    from simulated_stage.scenario import build_microscope, load_scenario

    stage = build_microscope(load_scenario("dot-loop"))
    plan = FaultPlan((Fault("error_code", probability=1.0, methods=("set_field",)),), seed=1)
    faulty = FaultyStage(stage, plan.schedule(frozenset({"error_code"})))
    with pytest.raises(Exception, match="injected"):
        faulty.set_field(100e3)
    faulty.set_field(0.0)
    assert stage.magnet.field_a_per_m == 0.0


def test_watchdog_brings_a_field_left_on_to_zero():
    # a client that falls silent with the tip withdrawn but the magnet on: the field must not stay on
    now = [0.0]
    fake = MagnetController()
    fake.set_field(300e3)
    d = Dispatcher(fake, watchdog_s=2.0, clock=lambda: now[0])
    now[0] = 2.5
    assert d.watchdog() and fake.field == 0.0 and d.watchdog_trips == 1
    fake.field = 1e3  # under 1 % of the range: sensor noise, not a field left on
    d.activity()
    now[0] = 5.0
    assert not d.watchdog()
