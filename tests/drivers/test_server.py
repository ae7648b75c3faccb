"""The server's own duties, transport aside: hard limits enforced for a controller that checks nothing,
the safety reflex after a fault, refusal of insecure binds, clean stop."""

from __future__ import annotations

import sys
import threading
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
from link_fakes import FakeController, ThreadServer, ToyStage  # noqa: E402

from drivers.registry import is_loopback  # noqa: E402
from drivers.server import Dispatcher, InsecureBind, Session, serve  # noqa: E402
from drivers.wire import scpi  # noqa: E402
from drivers.fault_plan import STAGE_KINDS, FaultPlan  # noqa: E402
from simulated_stage.faults import FaultyStage  # noqa: E402


def _line(d, session, text):
    return d.handle_line(text.encode(), session)


def test_hostile_values_never_reach_the_controller():
    fake = FakeController()
    d, s = Dispatcher(fake, watchdog_s=None), Session()
    for text in ("MOT:Z 1", "MOT:Z -1e-9", "MOT:Z NAN", "MOT:Z INF", "BIAS:VOLT 10.000001", "BIAS:VOLT -1e300",
                 "DRIV:SET 1e5,5", "DRIV:SET -1,0.1", "SCAN:LINE? 0,0,1e-6,16,1,1e-3,0", "SCAN:LINE? 0,0,1e-6,16,1,2e-8,20",
                 "MOT:XY 1,1", "FEED:SET 1,NAN,DEF,DEF", "FEED:SET 1,DEF,-1,DEF", "MOT:COAR 1000000"):
        assert _line(d, s, text) is None
        code, message = s.errors.pop()
        assert code == -222, (text, code, message)
        assert "outside the allowed range" in message
    assert sum(fake.calls.values()) == 0
    assert fake.stage.z_m == 0.0 and fake.stage.bias_v == 0.0


def test_at_the_limits_the_command_runs():
    fake = FakeController()
    d, s = Dispatcher(fake, watchdog_s=None), Session()
    _line(d, s, f"MOT:Z {fake.limits.z_range_m!r};BIAS:VOLT -{fake.limits.bias_max_v!r}")
    assert s.errors.pop() == (0, "No error")
    assert fake.stage.z_m == fake.limits.z_range_m and fake.stage.bias_v == -fake.limits.bias_max_v


def test_a_controller_fault_leaves_the_stage_safe_and_is_reported():
    stage = ToyStage()
    proxy = FaultyStage(stage, FaultPlan.from_specs(["error_code:after=0:code=333:methods=scan"])
                        .schedule(STAGE_KINDS))
    fake = FakeController(proxy)
    d, s = Dispatcher(fake, watchdog_s=None), Session()
    _line(d, s, "FEED:SET 1,DEF,DEF,DEF;BIAS:VOLT 2;DRIV:SET 7e4,0.1")
    assert fake.status().engaged
    assert _line(d, s, "SCAN:LINE? 0,0,1e-6,16,1,2e-8,0") is None
    code, message = s.errors.pop()
    assert code == 333 and "injected" in message
    assert fake.status().safe  # the server's reflex, before any client asked


def test_unexpected_exceptions_are_execution_errors():
    class Broken(FakeController):
        def read(self, channels):
            raise ZeroDivisionError("boom")

    d, s = Dispatcher(Broken(), watchdog_s=None), Session()
    _line(d, s, "MEAS:READ? sum_v")
    code, message = s.errors.pop()
    assert code == -200 and "ZeroDivisionError" in message


def test_deflection_record_without_start_is_a_settings_conflict():
    d, s = Dispatcher(FakeController(), watchdog_s=None), Session()
    _line(d, s, "ACQ:DEFL:NEXT?")
    assert s.errors.pop()[0] == -221


def test_network_requests_are_deduplicated_per_session():
    from drivers.wire import messages
    from drivers.wire.commands import command

    fake = FakeController()
    d = Dispatcher(fake, watchdog_s=None)
    move = messages.encode_request(messages.Request("alpha", 5, command("MOTion:COARse"), (4,)))
    first = d.handle_frames(move)
    again = d.handle_frames(move)
    other = d.handle_frames(messages.encode_request(messages.Request("beta", 5, command("MOTion:COARse"), (4,))))
    assert first == again and fake.calls["step_coarse"] == 2 and other[0].startswith(b'{"v":1,"id":5,"ok":true')


@pytest.mark.parametrize("bind", ["tcp://0.0.0.0:0", "tcp://192.0.2.1:5555", "10.0.0.1:0", "tcp://[::]:0"])
def test_non_loopback_bind_without_keys_is_refused(bind):
    with pytest.raises(InsecureBind) as err:
        serve(FakeController(), transport="zmq", bind=bind, announce=lambda d: pytest.fail("announced"))
    assert "mfma keys generate" in str(err.value)


def test_stream_transport_stays_on_loopback_and_refuses_keys(tmp_path):
    with pytest.raises(InsecureBind):
        serve(FakeController(), transport="serial", bind="tcp://0.0.0.0:0", announce=lambda d: None)
    with pytest.raises(InsecureBind):
        serve(FakeController(), transport="serial", server_key=str(tmp_path / "s.key_secret"),
              allow_dir=str(tmp_path), announce=lambda d: None)


def test_loopback_detection():
    assert all(map(is_loopback, ["127.0.0.1", "127.3.2.1", "::1", "[::1]", "localhost"]))
    assert not any(map(is_loopback, ["0.0.0.0", "::", "192.168.1.2", "example.org", ""]))


@pytest.mark.parametrize("transport", ["serial", "zmq"])
def test_stop_ends_serving_and_leaves_the_stage_safe(transport):
    fake = FakeController()
    srv = ThreadServer(fake, transport=transport, watchdog_s=None)
    announcement = srv.start()
    assert ("port" if transport == "serial" else "endpoint") in announcement
    fake.stage.set_feedback(True)
    fake.stage.set_bias(1.0)
    srv.close()
    assert not srv.thread.is_alive() and fake.status().safe


def test_unknown_transport():
    with pytest.raises(ValueError, match="transport"):
        serve(FakeController(), transport="carrier-pigeon", announce=lambda d: None, stop=threading.Event())


def test_error_queue_is_per_stream_session_and_bounded():
    d, s = Dispatcher(FakeController(), watchdog_s=None), Session()
    for _ in range(100):
        _line(d, s, "NOPE")
    assert len(s.errors) == 32
    codes = [s.errors.pop()[0] for _ in range(33)]
    assert codes[-2:] == [-350, 0] and scpi.STANDARD_ERRORS[-350] == "Queue overflow"


from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

LINE_JUNK = st.binary(max_size=200) | st.lists(st.sampled_from(
    ["MOT:Z ", "BIAS:VOLT ", "SCAN:LINE? ", "*IDN?", "SYST:ERR?", ";", ",", "1e-6", "NAN", "DEF", '"x"', "#", "\x00",
     "MEAS:READ? ", "sum_v", "ACQ:DEFL:STAR ", "100", "FEED:SET ", "ON", "*RST", "DRIV:SWE? "]), max_size=12).map(
    lambda parts: "".join(parts).encode("latin-1"))


@settings(max_examples=500, deadline=None)
@given(st.lists(LINE_JUNK, min_size=1, max_size=5))
def test_dispatcher_survives_any_lines(lines):
    fake = FakeController()
    d, s = Dispatcher(fake, watchdog_s=None), Session()
    for line in lines:
        reply = d.handle_line(line.replace(b"\n", b" "), s)
        assert reply is None or reply.endswith(b"\n")
    lim = fake.limits
    assert 0.0 <= fake.stage.z_m <= lim.z_range_m and abs(fake.stage.bias_v) <= lim.bias_max_v
    assert d.handle_line(b"*CLS;*IDN?", s) == b"Toy Works,T-1,0001,0.1\n"


@settings(max_examples=300, deadline=None)
@given(st.lists(st.binary(max_size=80) | LINE_JUNK, max_size=4))
def test_dispatcher_survives_any_frames(frames):
    d = Dispatcher(FakeController(), watchdog_s=None)
    reply = d.handle_frames(frames)
    assert isinstance(reply, list) and reply and reply[0].startswith(b'{"v":1')
