"""The serial link end to end: a pseudo-terminal (and pyserial's socket:// on loopback) between the
SerialController and the server around a fake controller; hostile input through the error queue."""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
import pytest
import serial

sys.path.insert(0, str(Path(__file__).parent))
from link_fakes import OPEN_REQUESTS, FakeController, ThreadServer  # noqa: E402

from drivers.base import LineSpec, SecondPass  # noqa: E402
from drivers.errors import BadURL, LimitExceeded, LinkTimeout, ProtocolError  # noqa: E402
from drivers.registry import open_controller  # noqa: E402
from drivers.serial_link import SerialController  # noqa: E402
from drivers.fault_plan import FaultPlan  # noqa: E402

pytestmark = pytest.mark.timeout(60)


@pytest.fixture(params=["pty", "socket"])
def served(request):
    fake = FakeController()
    bind = None if request.param == "pty" else "tcp://127.0.0.1:0"
    with ThreadServer(fake, transport="serial", bind=bind, watchdog_s=None) as srv:
        yield fake, srv.announcement["port"]


def test_whole_interface_round_trips(served):
    fake, port = served
    with SerialController(port, timeout_s=2.0) as c:
        assert c.info.maker == "Toy Works" and c.limits == fake.limits and c.capabilities == fake.capabilities
        assert c.read(["sum_v", "z_m"]) == {"sum_v": 3.0, "z_m": 0.0}
        c.move_z(1.25e-6)
        c.set_drive(70e3, 0.1)
        c.set_bias(-2.5)
        s = c.status()
        assert (s.z_m, s.bias_v, s.drive_on, s.drive_frequency_hz) == (1.25e-6, -2.5, True, 70e3)
        spec = LineSpec(0.0, 0.0, 2e-6, 64, 1.0, (SecondPass(20e-9), SecondPass(50e-9, 1.0)))
        line = c.scan_line(spec)
        direct = fake.scan_line(spec)
        np.testing.assert_array_equal(line.topography_m, direct.topography_m)
        np.testing.assert_allclose(line.passes[1].phase_deg, direct.passes[1].phase_deg, rtol=1e-6)  # float32
        assert [p.lift_height_m for p in line.passes] == [20e-9, 50e-9]
        f = np.linspace(60e3, 80e3, 5000)  # more points than one request carries
        np.testing.assert_array_equal(c.sweep(f, 0.1).frequency_hz, f)
        chunks = list(c.record_deflection(10_000, 1e6, chunk=1 << 18))
        assert sum(map(len, chunks)) == 10_000 and max(map(len, chunks)) <= c.chunk_limit
        assert chunks[0].dtype == np.float32
        assert len(c.force_curve(1e-6, 50).z_m) == 50
        c.step_coarse(3)
        assert fake.calls["step_coarse"] == 1
        c.make_safe()
        assert c.status().safe and fake.status().safe


def test_limits_refused_by_the_client_driver(served):
    fake, port = served
    with SerialController(port) as c:
        with pytest.raises(LimitExceeded) as err:
            c.move_z(20e-6)
        assert err.value.high == fake.limits.z_range_m and "z_m" in str(err.value)
        assert fake.calls["move_z"] == 0


def _raw(port: str):
    return serial.serial_for_url(port, baudrate=115200, timeout=2.0)


def _ask(raw, line: bytes) -> bytes:
    raw.write(line)
    reply = raw.read_until(b"\n")
    assert reply.endswith(b"\n"), f"no complete reply to {line[:40]!r}: {reply!r}"  # read_until may time out
    return reply


def _errors(raw) -> list[int]:
    codes = []
    for _ in range(40):
        code = int(_ask(raw, b"SYST:ERR?\n").split(b",")[0])
        if code == 0:
            return codes
        codes.append(code)
    raise AssertionError("error queue never emptied")


def test_hostile_input_through_the_error_queue_and_the_server_keeps_serving(served):
    fake, port = served
    raw = _raw(port)
    try:
        raw.write(b"\x00\xff\xfe#9999\x07junk\n")
        raw.write(b"NOSUCH:HEADER 1\n")
        raw.write(b"A" * 100_000 + b"\n")  # a 100 kB line
        raw.write(b"MOT:Z abc\n")
        raw.write(b"MOT:Z 1\n")  # 1 m: far past the Z range
        raw.write(b"BIAS:VOLT 1e9;BIAS:VOLT NAN;BIAS:VOLT -INF\n")
        raw.write(b"STAT\n")  # a query without its question mark
        codes = _errors(raw)
        assert codes == [-101, -113, -363, -104, -222, -222, -222, -222, -113]
        assert fake.stage.z_m == 0.0 and fake.stage.bias_v == 0.0 and fake.calls["set_bias"] == 0
        idn = _ask(raw, b"*IDN?\n").decode().strip().split(",")
        assert idn == ["Toy Works", "T-1", "0001", "0.1"]  # IEEE 488.2: four fields
        assert _ask(raw, b"*OPC?\n") == b"1\n"
        assert _ask(raw, b'SYST:ERR?\n') == b'0,"No error"\n'
    finally:
        raw.close()
    with SerialController(port) as c:  # and a proper client still works
        assert c.status().safe


def test_registry_opens_serial_urls(served):
    fake, port = served
    url = f"serial://{port}?timeout=1.5" if port.startswith("/") else f"{port}?timeout=1.5"
    with open_controller(url) as c:
        assert isinstance(c, SerialController) and c.timeout_s == 1.5
    with pytest.raises(BadURL):
        open_controller(url + "&colour=blue")


@pytest.mark.parametrize("kind", ["corrupt_reply", "truncated_reply", "timeout"])
def test_garbled_or_lost_reply_is_a_typed_error_and_the_link_recovers(kind):
    fake = FakeController()
    n = OPEN_REQUESTS["serial"]
    plan = FaultPlan.from_specs([f"{kind}:after={n}:flip_bytes=40"])  # the first request after opening
    with ThreadServer(fake, transport="serial", watchdog_s=None, faults=plan) as srv:
        with SerialController(srv.announcement["port"], timeout_s=0.5, retries=0) as c:
            t0 = time.monotonic()
            with pytest.raises((ProtocolError, LinkTimeout)):
                c.scan_line(LineSpec(0.0, 0.0, 1e-6, 128, 100.0, (SecondPass(20e-9),)))
            assert time.monotonic() - t0 < 0.5 + 2.0 * (1 + 1) / 100.0 + 0.5  # within its deadline
            assert fake.calls["scan"] == 1  # not repeated: a scan line is not safe to repeat
            assert c.read(["sum_v"]) == {"sum_v": 3.0}  # resynchronised


def test_safe_command_is_retried_after_a_lost_reply():
    fake = FakeController()
    plan = FaultPlan.from_specs([f"timeout:after={OPEN_REQUESTS['serial']}"])
    with ThreadServer(fake, transport="serial", watchdog_s=None, faults=plan) as srv:
        with SerialController(srv.announcement["port"], timeout_s=0.3, retries=1) as c:
            c.move_z(2e-6)  # first reply lost, the repeat (an absolute move) answers
            assert fake.stage.z_m == 2e-6


def test_no_server_at_the_other_end_times_out_on_open():
    import os

    master, slave = os.openpty()
    try:
        t0 = time.monotonic()
        with pytest.raises(LinkTimeout):
            SerialController(os.ttyname(slave), timeout_s=0.3)
        assert time.monotonic() - t0 < 1.5
    finally:
        os.close(master)
        os.close(slave)
