"""The ZeroMQ link end to end on loopback: the whole interface, a retried motion that runs once, lost and
garbled replies, hostile frames, and a killed server reported within the client's timeout."""

from __future__ import annotations

import os
import signal
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import zmq

sys.path.insert(0, str(Path(__file__).parent))
from link_fakes import OPEN_REQUESTS, FakeController, ThreadServer, spawn_server  # noqa: E402

from drivers.base import LineSpec, SecondPass  # noqa: E402
from drivers.errors import BadURL, LimitExceeded, LinkLost, LinkTimeout, ProtocolError  # noqa: E402
from drivers.network_link import NetworkController  # noqa: E402
from drivers.registry import open_controller  # noqa: E402
from drivers.fault_plan import FaultPlan  # noqa: E402

pytestmark = pytest.mark.timeout(60)
FIRST = OPEN_REQUESTS["zmq"]  # requests made while opening


def _serve(fake, plan=None):
    return ThreadServer(fake, transport="zmq", watchdog_s=None, faults=plan)


def test_whole_interface_round_trips():
    fake = FakeController()
    with _serve(fake) as srv:
        assert srv.announcement["endpoint"].startswith("tcp://127.0.0.1:")
        with NetworkController(srv.announcement["endpoint"]) as c:
            assert c.info == fake.info and c.limits == fake.limits
            c.set_feedback(True, setpoint_v=0.2, p_gain=1.0)
            assert c.status().engaged
            spec = LineSpec(0.0, 0.0, 2e-6, 256, 1.0, tuple(SecondPass(h * 1e-9) for h in (10, 20, 40)))
            line = c.scan_line(spec)
            np.testing.assert_array_equal(line.topography_m, fake.scan_line(spec).topography_m)
            assert len(line.passes) == 3 and line.passes[0].frequency_shift_hz is not None
            assert len(list(c.record_deflection(5000, 1e5, chunk=2000))) == 3
            c.make_safe()
            assert fake.status().safe


def test_registry_opens_zmq_urls_and_refuses_plain_remote_hosts():
    fake = FakeController()
    with _serve(fake) as srv:
        url = srv.announcement["endpoint"].replace("tcp://", "zmq+tcp://") + "?timeout=1&retries=0"
        with open_controller(url) as c:
            assert isinstance(c, NetworkController) and c.retries == 0
    with pytest.raises(BadURL, match="unencrypted"):
        NetworkController.from_url("zmq+tcp://192.0.2.1:5555")  # documentation address, never contacted
    with pytest.raises(BadURL):
        NetworkController.from_url("zmq+tcp://127.0.0.1")
    with pytest.raises(BadURL, match="scenario"):
        open_controller("zmq+tcp://127.0.0.1:1", scenario="default")


def test_retried_motion_runs_once(caplog):
    """The reply to the move is lost; the client times out, reconnects and repeats the same request id;
    the server answers from memory instead of moving again."""
    caplog.set_level("INFO", logger="drivers.server")
    fake = FakeController()
    with _serve(fake, FaultPlan.from_specs([f"timeout:after={FIRST}"])) as srv:
        with NetworkController(srv.announcement["endpoint"], timeout_s=0.3, retries=2) as c:
            c.move_z(3e-6)
            assert fake.calls["move_z"] == 1 and fake.stage.z_m == 3e-6
            assert "answered from memory" in caplog.text  # it really was retried
            c.move_z(1e-6)  # the next request is a new id and runs
            assert fake.calls["move_z"] == 2


def test_unsafe_command_is_not_retried():
    fake = FakeController()
    with _serve(fake, FaultPlan.from_specs([f"timeout:after={FIRST}"])) as srv:
        with NetworkController(srv.announcement["endpoint"], timeout_s=0.3, retries=2) as c:
            t0 = time.monotonic()
            with pytest.raises(LinkTimeout):
                c.step_coarse(10)
            assert time.monotonic() - t0 < 0.3 + 0.01 + 0.5
            assert fake.calls["step_coarse"] == 1
            assert c.status().coarse_position_m == pytest.approx(10e-6)  # and the link works again


@pytest.mark.parametrize("kind", ["corrupt_reply", "truncated_reply", "delay"])
def test_garbled_reply_to_a_safe_command_is_retried(kind):
    fake = FakeController()
    plan = FaultPlan.from_specs([f"{kind}:after={FIRST}:flip_bytes=5:delay_s=0.5"])
    with _serve(fake, plan) as srv:
        with NetworkController(srv.announcement["endpoint"], timeout_s=0.3, retries=2) as c:
            assert c.status().z_m == 0.0


def test_garbled_reply_to_an_unsafe_command_is_a_protocol_error():
    fake = FakeController()
    with _serve(fake, FaultPlan.from_specs([f"truncated_reply:after={FIRST}"])) as srv:
        with NetworkController(srv.announcement["endpoint"], timeout_s=0.5) as c:
            with pytest.raises(ProtocolError):
                c.scan_line(LineSpec(0.0, 0.0, 1e-6, 32, 100.0, (SecondPass(20e-9),)))
            assert fake.calls["scan"] == 1


def test_hostile_frames_get_error_replies_and_the_server_keeps_serving():
    fake = FakeController()
    with _serve(fake) as srv:
        ctx = zmq.Context()
        try:
            for frames in ([b"\x00\xff" * 50], [b"{}"], [b'{"v":1,"session":"s","id":1,"cmd":"MOTion:Z","args":[1]}'],
                           [b"A" * 100_000], [b"x", b"y", b"z"]):
                s = ctx.socket(zmq.REQ)
                s.setsockopt(zmq.LINGER, 0)
                s.connect(srv.announcement["endpoint"])
                s.send_multipart(frames)
                assert s.poll(2000), f"no answer to {frames[0][:20]!r}"
                import json

                reply = json.loads(s.recv_multipart()[0])
                assert reply["ok"] is False and reply["code"] < 0
                s.close(0)
            # frames larger than the server accepts only cost the sender its connection
            big = ctx.socket(zmq.REQ)
            big.setsockopt(zmq.LINGER, 0)
            big.connect(srv.announcement["endpoint"])
            big.send(b"A" * (2 << 20))
            assert not big.poll(300)
            big.close(0)
        finally:
            ctx.term()
        assert fake.stage.z_m == 0.0 and fake.calls["move_z"] == 0
        with NetworkController(srv.announcement["endpoint"]) as c:
            with pytest.raises(LimitExceeded):
                c.move_z(1.0)
            assert c.status().safe


@pytest.mark.parametrize("transport", ["zmq", "serial"])
def test_killed_server_is_reported_within_the_client_timeout(transport):
    from link_fakes import connect

    proc, announcement = spawn_server(transport)
    try:
        c = connect(announcement, timeout_s=1.0, retries=1)
        assert c.status().safe
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(5)
        t0 = time.monotonic()
        with pytest.raises((LinkLost, LinkTimeout)) as err:
            c.status()
        print(transport, type(err.value).__name__, err.value)
        elapsed = time.monotonic() - t0
        assert elapsed < 1.0 * (1 + 1) + 0.5, f"took {elapsed:.2f} s"
        c.close()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(5)


@pytest.mark.parametrize("transport", ["serial", "zmq"])
def test_simulated_controller_over_the_link(transport):
    """The real simulated stage behind the server, with an injected laser loss arriving as LaserLost."""
    from link_fakes import connect

    from drivers.errors import LaserLost
    from drivers.simulated import SimulatedController
    from drivers.fault_plan import STAGE_KINDS
    from simulated_stage.faults import FaultyStage
    from simulated_stage.scenario import build_microscope, load_scenario

    scenario = load_scenario("default")
    plan = FaultPlan.from_specs(["laser_loss:after=1:methods=read"])
    sim = SimulatedController(FaultyStage(build_microscope(scenario, seed=2), plan.schedule(STAGE_KINDS)),
                              scenario=scenario, seed=2)
    with ThreadServer(sim, transport=transport, watchdog_s=None) as srv:
        with connect(srv.announcement, timeout_s=5.0) as c:
            assert c.info == sim.info and c.limits == sim.limits and c.capabilities == sim.capabilities
            assert c.probe_hint() == sim.probe_hint()
            f0 = sim.stage.f0  # the stage's true resonance (default scenario: 75 kHz)
            sweep = c.sweep(np.linspace(f0 - 2e3, f0 + 2e3, 81), 0.05)
            assert np.all(np.isfinite(sweep.amplitude_v)) and len(sweep.phase_deg) == 81
            f_peak = float(sweep.frequency_hz[np.argmax(sweep.amplitude_v)])
            assert abs(f_peak - f0) <= 50.0  # one frequency step: the peak came through the link in order
            c.set_drive(f_peak, 0.05)
            record = np.concatenate(list(c.record_deflection(4096, 1e6, chunk=1024)))
            assert record.shape == (4096,) and record.dtype == np.float32 and np.std(record) > 0
            with pytest.raises(LimitExceeded):
                c.set_bias(sim.limits.bias_max_v * 2)
            c.read(["sum_v"])
            with pytest.raises(LaserLost):
                c.read(["sum_v", "amplitude_v"])  # the second reading: the laser goes
            c.make_safe()
            status = c.status()
            assert status.safe and "laser lost" in status.faults
