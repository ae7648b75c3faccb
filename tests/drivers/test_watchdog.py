"""The controller-side watchdog: an engaged client that falls silent gets the tip withdrawn, the drive off and
the bias at zero within the set time; a client process killed with SIGKILL included."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
from link_fakes import ROOT, FakeController, ThreadServer, connect  # noqa: E402

from drivers.server import Dispatcher  # noqa: E402

pytestmark = pytest.mark.timeout(60)


class ManualClock:
    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t


def _engaged_fake():
    fake = FakeController()
    fake.stage.set_feedback(True)
    fake.stage.set_drive(7e4, 0.1)
    fake.stage.set_bias(2.0)
    return fake


def test_silence_while_engaged_trips_on_the_virtual_clock():
    clock, fake = ManualClock(), _engaged_fake()
    d = Dispatcher(fake, watchdog_s=2.0, clock=clock)
    clock.t = 1.5
    assert not d.watchdog() and fake.status().engaged
    clock.t = 2.0
    d.activity()  # the client spoke: the silence starts again
    clock.t = 3.5
    assert not d.watchdog()
    clock.t = 4.0
    assert not d.watchdog()  # exactly the limit is still allowed
    clock.t = 4.01
    assert d.watchdog() and fake.status().safe and d.watchdog_trips == 1
    fake.stage.set_feedback(True)
    clock.t = 10.0
    assert not d.watchdog()  # once per silence: the client may be gone for good, the stage is safe already
    d.activity()
    clock.t = 12.5
    assert d.watchdog() and d.watchdog_trips == 2


def test_a_client_that_only_polls_does_not_keep_a_silent_drivers_stage_engaged():
    # several network clients may share a server: the silence of the one that drives the stage (its last command
    # acting on the instrument) counts. Before, any client's message reset the watchdog: a status display polling every
    # second kept the tip engaged after the driving client had died, until the display stopped too
    from drivers.wire import messages
    from drivers.wire.commands import command

    clock, fake = ManualClock(), FakeController()
    d = Dispatcher(fake, watchdog_s=2.0, clock=clock)

    def send(session, number, spelling, *args):
        d.activity(session)  # as the transport does on receiving the message
        req = messages.Request(session, number, command(spelling), args)
        return messages.decode_reply(req.command, d.handle_frames(messages.encode_request(req)))

    assert send("driver", 1, "FEEDback:SET", True, 0.2, None, None).ok  # the driving client engages
    assert fake.status().engaged
    assert send("display", 9, "*CLS").ok and d.driving == "driver"  # clearing its error queue drives nothing
    for n, t in enumerate((0.5, 1.0, 1.5, 2.0)):  # the driver is silent from t = 0; a display polls
        clock.t = t
        assert send("display", n + 1, "STATus?").ok
        assert not d.watchdog()
    clock.t = 2.5
    assert send("display", 5, "STATus?").ok
    assert d.watchdog() and fake.status().safe  # 2.5 s of the driver's silence, not 0 s since the display spoke
    d2 = Dispatcher(_engaged_fake(), watchdog_s=2.0, clock=clock)
    clock.t = 10.0
    d2.activity("display")  # no driving client known (engaged before any command): any client counts
    clock.t = 11.5
    assert not d2.watchdog()


def test_silence_while_withdrawn_does_nothing():
    clock, fake = ManualClock(), FakeController()
    d = Dispatcher(fake, watchdog_s=1.0, clock=clock)
    clock.t = 100.0
    assert not d.watchdog() and sum(fake.calls.values()) == 0


def test_silence_with_the_drive_on_but_withdrawn_does_nothing():
    clock, fake = ManualClock(), FakeController()
    fake.stage.set_drive(7e4, 0.1)
    d = Dispatcher(fake, watchdog_s=1.0, clock=clock)
    clock.t = 100.0
    assert not d.watchdog() and fake.status().drive_on


def test_disabled_watchdog():
    clock, fake = ManualClock(), _engaged_fake()
    d = Dispatcher(fake, watchdog_s=None, clock=clock)
    clock.t = 1e6
    assert not d.watchdog() and fake.status().engaged


def _wait_safe(fake, limit_s):
    t0 = time.monotonic()
    while time.monotonic() - t0 < limit_s:
        if fake.status().safe:
            return time.monotonic() - t0
        time.sleep(0.01)
    raise AssertionError(f"stage not safe after {limit_s} s: {fake.status()}")


@pytest.mark.parametrize("transport", ["serial", "zmq"])
def test_silent_client_over_a_real_link(transport):
    fake = FakeController()
    with ThreadServer(fake, transport=transport, watchdog_s=0.3) as srv:
        c = connect(srv.announcement)
        c.set_drive(7e4, 0.1)
        c.set_feedback(True, setpoint_v=0.2)
        c.set_bias(1.5)
        assert c.status().engaged
        elapsed = _wait_safe(fake, 2.0)  # the client is still connected, just silent
        assert elapsed <= 0.3 + 0.25
        c.close()


def test_a_polling_second_client_over_zeromq_does_not_mask_the_drivers_silence():
    fake = FakeController()
    with ThreadServer(fake, transport="zmq", watchdog_s=0.3) as srv:
        driver, display = connect(srv.announcement), connect(srv.announcement)
        driver.set_drive(7e4, 0.1)
        driver.set_feedback(True, setpoint_v=0.2)
        assert driver.status().engaged
        t0 = time.monotonic()
        while not fake.status().safe and time.monotonic() - t0 < 3.0:
            display.status()  # polled every 20 ms: before, this kept the stage engaged for as long as it went on
            time.sleep(0.02)
        assert fake.status().safe and time.monotonic() - t0 <= 0.3 + 0.25
        driver.close()
        display.close()


CLIENT = """
import sys, time
sys.path[:0] = {paths!r}
from drivers.network_link import NetworkController
c = NetworkController({endpoint!r})
c.set_drive(7e4, 0.1); c.set_feedback(True, setpoint_v=0.2); c.set_bias(2.0)
sys.stdout.write("engaged\\n"); sys.stdout.flush()
time.sleep(60)
"""


def test_sigkilled_client_process_gets_the_tip_withdrawn():
    fake = FakeController()
    with ThreadServer(fake, transport="zmq", watchdog_s=0.5) as srv:
        code = CLIENT.format(paths=[str(ROOT)], endpoint=srv.announcement["endpoint"])
        proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True, cwd=ROOT)
        try:
            assert proc.stdout.readline().strip() == "engaged"
            assert fake.status().engaged
            os.kill(proc.pid, signal.SIGKILL)
            killed = time.monotonic()
            proc.wait(5)
            _wait_safe(fake, 3.0)
            assert time.monotonic() - killed <= 0.5 + 0.3
            assert srv.thread.is_alive()  # and the server is still serving
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait(5)


def test_a_command_longer_than_the_watchdog_time_is_not_silence():
    class SlowScan(FakeController):
        def scan_line(self, spec):
            time.sleep(0.6)  # the instrument is busy; the client is waiting, not gone
            return super().scan_line(spec)

    from drivers.base import LineSpec

    fake = SlowScan()
    with ThreadServer(fake, transport="zmq", watchdog_s=0.3) as srv:
        with connect(srv.announcement, timeout_s=3.0) as c:
            c.set_feedback(True, setpoint_v=0.2)
            c.scan_line(LineSpec(0.0, 0.0, 1e-6, 8, 100.0))
            assert fake.status().engaged  # not withdrawn right after the long line
            c.status()
