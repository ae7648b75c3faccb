"""abort(): from another thread it stops a long scan line, sweep or record at once, in-process and over both
links (handled by the server ahead of the running command), and leaves the stage withdrawn, drive off, bias 0.

Bounds here are generous (1 s, against lines of 4 s): the machine is shared. The measured figures (a few ms)
come from ``python tests/benchmarks/run.py abort``.
"""

from __future__ import annotations

import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from kit_drivers import kit_controller  # noqa: E402
from link_fakes import ThreadServer  # noqa: E402

from drivers.base import LineSpec, SecondPass  # noqa: E402
from drivers.conformance.trials import engage  # noqa: E402
from drivers.errors import Aborted  # noqa: E402
from drivers.registry import open_controller  # noqa: E402
from drivers.server.inflight import is_abort_line  # noqa: E402

pytestmark = pytest.mark.timeout(60)
BOUND_S = 1.0
LINE = LineSpec(0.0, -0.5e-6, 1e-6, 32, 1.0, tuple(SecondPass(h * 1e-9) for h in (20, 40, 80)))  # 4 s


def long_calls(ctl):
    f = np.linspace(7.3e4, 7.7e4, 400)
    return {"scan_line": lambda: ctl.scan_line(LINE),
            "sweep": lambda: ctl.sweep(f, 0.1, settle_s=0.01),  # 4 s
            "record": lambda: sum(len(c) for c in ctl.record_deflection(400_000, 1e5, chunk=50_000))}  # 4 s


def abort_during(ctl, call, after_s: float = 0.1) -> tuple[float, float, BaseException | None]:
    """(abort() time, time from abort to the call's end, the call's exception)."""
    box: dict = {}

    def target():
        try:
            call()
        except BaseException as exc:
            box["exc"] = exc
        box["end"] = time.monotonic()

    th = threading.Thread(target=target)
    th.start()
    time.sleep(after_s)
    t0 = time.monotonic()
    ctl.abort()
    t1 = time.monotonic()
    th.join(10)
    assert not th.is_alive()
    return t1 - t0, box["end"] - t0, box.get("exc")


def check_stops(ctl, which: str) -> None:
    if which == "scan_line":
        engage(ctl, {}, travel_max_m=50e-6)
    took, ended, exc = abort_during(ctl, long_calls(ctl)[which])
    assert isinstance(exc, Aborted), f"{which} ended with {exc!r}"
    assert took < BOUND_S and ended < BOUND_S, f"abort {took:.3f} s, call ended {ended:.3f} s after it"
    assert ctl.status().safe


@pytest.mark.parametrize("which", ["scan_line", "sweep", "record"])
def test_abort_stops_a_long_call_in_process(which):
    check_stops(kit_controller(), which)


@pytest.fixture(scope="module", params=["zmq", "serial"])
def served(request):
    sim = kit_controller()
    with ThreadServer(sim, transport=request.param, watchdog_s=5.0) as srv:
        a = srv.announcement
        url = ("zmq+tcp://" + a["endpoint"].split("//", 1)[1]) if "endpoint" in a else f"serial://{a['port']}"
        with open_controller(url) as ctl:
            yield sim, ctl


@pytest.mark.parametrize("which", ["scan_line", "sweep", "record"])
def test_abort_stops_a_long_call_over_the_link(served, which):
    sim, ctl = served
    check_stops(ctl, which)
    assert sim.status().safe
    assert ctl.read(["sum_v"])["sum_v"] > 0  # the link is in step afterwards


def test_after_an_abort_the_next_call_runs():
    ctl = kit_controller()
    engage(ctl, {}, travel_max_m=50e-6)
    _, _, exc = abort_during(ctl, long_calls(ctl)["scan_line"])
    assert isinstance(exc, Aborted) and not ctl.stage.clock.interrupted
    ctl.set_drive(7.5e4, 0.1)
    assert ctl.status().drive_on


def test_abort_on_an_idle_stage_is_quick_idempotent_and_from_many_threads():
    ctl = kit_controller()
    threads = [threading.Thread(target=ctl.abort) for _ in range(4)]
    t0 = time.monotonic()
    for th in threads:
        th.start()
    for th in threads:
        th.join(5)
    assert time.monotonic() - t0 < BOUND_S and ctl.status().safe
    ctl.set_drive(7.5e4, 0.1)
    assert ctl.status().drive_on


def test_serial_abort_while_short_commands_stream_keeps_the_link_in_step():
    sim = kit_controller()
    with ThreadServer(sim, transport="serial", watchdog_s=None) as srv:
        with open_controller(f"serial://{srv.announcement['port']}") as ctl:
            stop = threading.Event()
            errors: list[BaseException] = []

            def chatter():
                while not stop.is_set():
                    try:
                        values = ctl.read(["sum_v", "z_m"])
                        assert set(values) == {"sum_v", "z_m"}
                    except Aborted:
                        pass  # a read the abort caught in flight
                    except BaseException as exc:
                        errors.append(exc)
                        return

            th = threading.Thread(target=chatter)
            th.start()
            for _ in range(20):
                ctl.abort()
                time.sleep(0.005)
            stop.set()
            th.join(10)
            assert not errors, errors
            assert ctl.status().safe and ctl.read(["sum_v"])["sum_v"] > 0


@pytest.mark.parametrize("line, yes", [(b"ABORt", True), (b":abor;SYST:ERR?", True), (b"  ABORT ;*OPC?", True),
                                       (b"ABORted", False), (b"*CLS;ABOR", False), (b"MOT:Z 0", False)])
def test_abort_lines_are_recognised_by_their_first_command(line, yes):
    assert is_abort_line(line) is yes


def test_server_watchdog_aborts_a_command_that_overruns():
    from drivers.server import Dispatcher, Session
    from drivers.wire.commands import command

    class Clock:
        t = 0.0

        def __call__(self):
            return self.t

    clock, sim = Clock(), kit_controller()
    d = Dispatcher(sim, watchdog_s=1.0, clock=clock)
    d.watch.begin(command("SCAN:LINE?"), (0.0, 0.0, 1e-6, 8, 1.0, (20e-9, 0.0)), sim.limits, Session())
    # expected 2 * (1 + 1) / 1 Hz = 4 s; overdue after twice that, the clients' 2 s timeout and the 1 s limit
    clock.t = 10.9
    assert not d.watch.overrun()
    clock.t = 11.1
    assert d.watch.overrun() and d.watch.aborts == 1
    assert not d.watch.overrun()  # once per command
    d.watch.end()
    assert d.watch.aborts == 1


# ---- with a magnet: abort() is a make-safe, so the field goes to 0 as well ------------------------------------

@pytest.mark.parametrize("transport", [None, "zmq", "serial"])
def test_abort_brings_an_applied_field_to_zero_and_the_client_knows(transport):
    from link_fakes import connect

    from drivers.simulated import SimulatedController

    sim = SimulatedController.from_url("sim://?pace=fast", seed=1)  # the default stage has a magnet
    if transport is None:
        sim.set_field(200e3)
        sim.abort()
        assert abs(sim.read_field()) < 1e3 and sim.status().safe
        return
    with ThreadServer(sim, transport=transport, watchdog_s=None) as srv, connect(srv.announcement) as ctl:
        ctl.set_field(200e3)
        ctl.abort()
        assert abs(sim.read_field()) < 1e3 and sim.status().safe
        # the client times its next field change from 0, not from the 200 kA/m it set before the abort
        assert ctl._field_a_per_m == 0.0


def test_server_overrun_watch_allows_a_magnet_its_longest_ramp():
    from link_fakes import FakeController

    from drivers.base import Limits
    from drivers.server import Dispatcher, Session
    from drivers.wire.commands import command

    class Clock:
        t = 0.0

        def __call__(self):
            return self.t

    clock = Clock()
    lim = Limits(field_max_a_per_m=500e3, field_ramp_a_per_m_per_s=50e3, field_settle_s=1.0)
    d = Dispatcher(FakeController(), watchdog_s=1.0, clock=clock)
    for spelling, args in (("MAGNet:FIELd", (100e3,)), ("SYSTem:SAFE", ())):
        d.watch.begin(command(spelling), args, lim, Session())
        # the server does not know the field: the longest ramp is -500 to +500 kA/m, 20 s plus 1 s settling; overdue
        # after twice that, the clients' 2 s timeout and the 1 s watchdog limit: 45 s
        clock.t += 44.9
        assert not d.watch.overrun(), spelling
        clock.t += 0.2
        assert d.watch.overrun(), spelling
        d.watch.end()


@pytest.mark.parametrize("transport", [None, "zmq", "serial"])
def test_abort_and_make_safe_zero_the_field_once_through_the_one_hook(transport):
    from link_fakes import connect

    from assistant.procedures.guard import safety_guard
    from drivers.simulated import SimulatedController

    class Counting(SimulatedController):
        """Counts the field step of a make-safe and every field change under it."""

        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            self.zeroings, self.set_calls = 0, []

        def zero_applied_field(self):
            self.zeroings += 1
            super().zero_applied_field()

        def set_field(self, field_a_per_m):
            self.set_calls.append(field_a_per_m)
            super().set_field(field_a_per_m)

    sim = Counting.from_url("sim://?pace=fast", seed=1)

    def each_stop(ctl):
        for name, stop in (("abort", ctl.abort), ("make_safe", ctl.make_safe), ("guard", None)):
            ctl.set_field(100e3)
            sim.zeroings, sim.set_calls = 0, []
            if stop is None:  # a procedure's guard on an error: one stop, not one per layer
                with pytest.raises(RuntimeError), safety_guard(ctl):
                    raise RuntimeError("a step failed")
            else:
                stop()
            assert (sim.zeroings, sim.set_calls) == (1, [0.0]), name
            assert abs(sim.read_field()) < 1e3 and sim.status().safe, name

    if transport is None:
        each_stop(sim)
        return
    with ThreadServer(sim, transport=transport, watchdog_s=None) as srv, connect(srv.announcement) as ctl:
        each_stop(ctl)
