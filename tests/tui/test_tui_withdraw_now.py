"""The withdraw key acts at once: pressed in the middle of a scan line at realtime pace (lines of 4 s), the stage
reports withdrawn, drive off and bias 0 V well before the line would have ended. And a fault in the UI's own code
mid-series leaves the stage the same way: the series does not scan on without a screen.

The bound is generous (1 s) for a shared machine; ``python tests/benchmarks/run.py abort`` measures the figure.
"""

from __future__ import annotations

import asyncio
import os
import signal
import time

import pytest

from assistant.procedures.calibrate import CalibrationSettings
from assistant.storage.probe_record import ProbeRecord
from assistant.tui.app import MfmApp
from drivers.registry import open_controller
from simulated_stage.clock import VirtualClock
from simulated_stage.scenario import Scenario

#: whichever key the app binds to its withdraw action
WITHDRAW = next(b.key for b in MfmApp.BINDINGS if b.action == "withdraw")
#: a small sample close to the tip: the approach is short and the field tables cheap
SCENARIO = """
name = "withdraw-now"
[instrument]
start_gap_um = 7.0
[sample]
pattern = "stripes"
period_nm = 400.0
extent_um = 3.0
pixel_nm = 20.0
"""


def _engaged_app(tmp_path) -> MfmApp:
    """An app on the small sample, calibrated and engaged at fast pace before the UI starts, then at realtime."""
    clock = VirtualClock("fast", max_lag_s=0.005)
    ctl = open_controller("sim://", scenario=Scenario.from_text(SCENARIO), clock=clock, seed=5)
    app = MfmApp(ctl, session_path=tmp_path / "s.h5", probe_record=ProbeRecord(tmp_path / "record"),
                 poll_interval_s=0.1)
    app.workflow.calibrate(CalibrationSettings(thermal_seconds=0.2))
    app.workflow.approach()
    assert ctl.status().engaged  # asked here, before any step runs: later it would wait for the line in flight
    clock.set_pace("realtime")
    return app


async def _start_series(app, pilot):
    """Start a series of 8 lines of 4 s (3 heights and the repeat pass at 1 Hz); return its view once inside the
    first line."""
    sv = app.view("series")
    for field, value in (("s-heights", "20,40,80"), ("s-lines", "8"), ("s-pixels", "16"), ("s-rate", "1")):
        sv.query_one(f"#{field}").value = value
    app.start_series(sv.checked_settings())
    await pilot.pause(0.8)
    assert app.busy == "series" and sv.lines_done == 0
    return sv


async def _withdraw_mid_line(tmp_path) -> tuple[float, float]:
    app = _engaged_app(tmp_path)
    async with app.run_test(size=(80, 24)) as pilot:
        sv = await _start_series(app, pilot)
        t0 = time.monotonic()
        await pilot.press(WITHDRAW)
        while not app._withdraw_confirmed:
            assert time.monotonic() - t0 < 10, "no confirmed withdraw"
            await pilot.pause(0.005)
        confirmed = time.monotonic() - t0
        while app.busy:
            await pilot.pause(0.01)
        step_ended = time.monotonic() - t0
        assert app.controller.status().safe and sv.lines_done == 0
        texts = [text for _, text in app.view("log").entries]
        assert "series: cancelled" in texts and any("confirmed by status" in t for t in texts)
    return confirmed, step_ended


def test_withdraw_key_mid_line_at_realtime_pace(tmp_path):
    confirmed, step_ended = asyncio.run(_withdraw_mid_line(tmp_path))
    assert confirmed < 1.0 and step_ended < 2.0, (confirmed, step_ended)


async def _crash_mid_series(tmp_path) -> tuple[object, float]:
    app = _engaged_app(tmp_path)
    crashed = []

    def drawing_fault():
        crashed.append(time.monotonic())
        raise RuntimeError("a fault in the drawing code")

    with pytest.raises(RuntimeError, match="drawing code"):  # run_test raises what ended the app
        async with app.run_test(size=(80, 24)) as pilot:
            sv = await _start_series(app, pilot)
            sv.redraw = drawing_fault
            sv.mark_dirty()
            await pilot.pause(1.0)
    assert crashed, "the fault never ran"
    return app.controller.status(), time.monotonic() - crashed[0]


def test_a_crash_of_the_ui_mid_series_leaves_the_stage_safe(tmp_path):
    """A fault in the UI's own code ends the app while a series scans (lines of 4 s, 32 s in all). The series
    must not run on without a screen or a withdraw key: the app stops it on the way out and the stage is left
    withdrawn, drive off, bias 0 V, well before the series would have ended."""
    status, after_crash_s = asyncio.run(_crash_mid_series(tmp_path))
    assert status.safe and not status.engaged and not status.drive_on and status.bias_v == 0.0, status
    assert after_crash_s < 10.0, after_crash_s


async def _terminated_mid_series(tmp_path, signum) -> tuple[object, int]:
    app = _engaged_app(tmp_path)
    async with app.run_test(size=(80, 24)) as pilot:
        await _start_series(app, pilot)
        os.kill(os.getpid(), signum)  # the app's handler: were it missing, the fixture's handler fails the test
        for _ in range(200):
            if not app.is_running:
                break
            await pilot.pause(0.05)
    return app.controller.status(), app.return_code


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP], ids=["kill", "hangup"])
def test_a_kill_or_a_closed_terminal_mid_series_leaves_the_stage_safe(tmp_path, signum):
    """`kill` (SIGTERM) or closing the terminal (SIGHUP) while a series scans: by default Python ends at once
    and the stage stays engaged; the app instead ends through its unexpected-end path, which stops the series and
    makes the stage safe, with exit status 130."""
    caught = []
    previous = signal.signal(signum, lambda *_: caught.append(signum))  # not this test process's end, at worst
    try:
        status, code = asyncio.run(_terminated_mid_series(tmp_path, signum))
    finally:
        signal.signal(signum, previous)
    assert not caught, "the app did not handle the signal"
    assert status.safe and not status.engaged and not status.drive_on and status.bias_v == 0.0, status
    assert code == 130
