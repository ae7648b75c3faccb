"""Headless tests of the terminal UI at 80 x 24 on the simulated stage (fixed seeds)."""

from __future__ import annotations

import asyncio
import functools
import gc
import html
import re
import time

import numpy as np
import pytest

from assistant.procedures.events import Progress
from assistant.storage.probe_record import ProbeRecord
from assistant.tui.app import MfmApp
from assistant.tui.bridge import ProcedureEvent
from assistant.tui.screens import ConfirmQuit, HelpScreen
from assistant.tui.widgets import HalfBlockImage
from drivers.registry import open_controller

SIZE = (80, 24)


def run_async(test):
    """Run an async test with asyncio (no async pytest plugin in the environment)."""

    @functools.wraps(test)
    def wrapper(*args, **kwargs):
        return asyncio.run(test(*args, **kwargs))

    return wrapper


def screen_text(app) -> str:
    """The visible characters of the screen, row by row, from the SVG screenshot."""
    rows: dict[int, list[tuple[float, str]]] = {}
    for m in re.finditer(r'<text[^>]*x="([\d.]+)"[^>]*clip-path="url\(#[^)]*line-(\d+)\)"[^>]*>(.*?)</text>',
                         app.export_screenshot()):
        rows.setdefault(int(m.group(2)), []).append((float(m.group(1)), html.unescape(m.group(3))))
    return "\n".join("".join(t for _, t in sorted(rows[r])).replace("\xa0", " ") for r in sorted(rows))


async def settle(app, pilot, *, timeout_s: float = 30.0) -> None:
    """Wait for the running step to finish, then let the UI handle the posted messages."""
    t0 = time.monotonic()

    def running():
        return app.busy or any(not w.is_finished for w in app.workers if w.group in ("procedure", "safety", "record"))

    while running():
        assert time.monotonic() - t0 < timeout_s, f"{app.busy} did not finish in {timeout_s} s"
        await pilot.pause(0.05)
    await pilot.pause(0.3)  # the workers' last messages are handled and the views redrawn


def make_app(tmp_path, seed: int = 7, **kw) -> MfmApp:
    ctl = open_controller("sim://", seed=seed)
    return MfmApp(ctl, session_path=tmp_path / "session.h5", probe_record=ProbeRecord(tmp_path / "record"),
                  poll_interval_s=0.1, **kw)


async def calibrate_and_approach(app, pilot, *, name: str = "lever-T1") -> None:
    app.view("probe").query_one("#probe-name").value = name
    app.start_calibration()
    await settle(app, pilot)
    assert app.workflow.calibration is not None, app.view("log").entries[-3:]
    app.start_approach()
    await settle(app, pilot)
    assert app.workflow.approach_result is not None and app.workflow.approach_result.engaged


def series_form(app, *, heights="10,20,40", lines=8, pixels=16):
    sv = app.view("series")
    sv.query_one("#s-heights").value = heights
    sv.query_one("#s-lines").value = str(lines)
    sv.query_one("#s-pixels").value = str(pixels)
    return sv


# ---- views with fake events, no controller ----------------------------------------------------------------
@run_async
async def test_each_view_renders_with_its_content():
    app = MfmApp(None)
    async with app.run_test(size=SIZE) as pilot:
        f = np.linspace(1e3, 2e5, 2000)
        psd = 1e-12 + 1e-9 / (1 + ((f - 7.5e4) / 400) ** 2)
        app.post_message(ProcedureEvent(Progress("thermal spectrum", 1, 2, "s", 0.1,
                                                 data={"frequency_hz": f, "psd_v2_per_hz": psd, "segments": 9})))
        sf = np.linspace(7.3e4, 7.7e4, 101)
        app.post_message(ProcedureEvent(Progress("sweep fit", 1, 1, "fit", 0.0, data={
            "frequency_hz": sf, "amplitude_v": 0.02 / np.hypot(1 - (sf / 7.5e4) ** 2, sf / 7.5e4 / 200),
            "phase_deg": np.degrees(np.arctan2(sf / 7.5e4 / 200, 1 - (sf / 7.5e4) ** 2)), "f0_hz": 7.5e4, "q": 200.0})))
        app.post_message(ProcedureEvent(Progress("approach", 20e-6, 300e-6, "m", 1.0,
                                                 data={"z_m": 4e-6, "amplitude_v": 0.3, "coarse_m": 20e-6})))
        sv = app.view("series")
        sv.begin(heights_m=(10e-9, 20e-9), biases_v=None, lines=4, pixels=16)
        await pilot.pause(0.2)
        rng = np.random.default_rng(1)
        app.post_message(ProcedureEvent(Progress("series", 1, 4, "lines", 0.5, 1.5, data={
            "row": 0, "phase_deg": rng.normal(size=(2, 16)), "topography_m": np.zeros(16),
            "heights_m": (10e-9, 20e-9)})))
        app.view("analysis").show({"heights_nm": [10, 20, 40], "magnetic_rms_deg": [1.0, 0.6, 0.3],
                                   "electrostatic_mean_deg": [-0.5, -0.4, -0.3], "short_range_mean_deg": [-1, -.2, 0],
                                   "recommended_lift_nm": 20.0, "cpd_v": None},
                                  mean_phase_deg=[-1.5, -0.6, -0.3])
        app.say("warning", "a test notice")
        expected = {"probe": "thermal PSD, 9 averages", "resonance": "fit f0 75 kHz, Q 200",
                    "approach": "coarse travel 20 of 300 µm", "series": "line 1 of 4 at every height",
                    "analysis": "lift 20 nm", "log": "a test notice"}
        for i, (key, text) in enumerate(expected.items()):
            await pilot.press(str(i + 1))
            await pilot.pause(0.3)
            shown = screen_text(app)
            assert text in shown, f"{key} view at 80x24 lacks {text!r}:\n{shown}"
            assert "no controller" in shown and "WITHDRAW" in shown  # status line and withdraw key always there
        for _ in range(50):  # the preview is mounted by a message of its own: on a loaded machine it may lag
            if sv.query(HalfBlockImage):
                break
            await pilot.pause(0.1)
        img = sv.query(HalfBlockImage).first()
        assert np.isfinite(img._img[0]).all() and np.isnan(img._img[1:]).all()  # line 1 in, lines 2-4 empty
        await pilot.press("question_mark")
        await pilot.pause()
        assert isinstance(app.screen, HelpScreen)
        assert "WITHDRAW" in screen_text(app)
        await pilot.press("escape")
        await pilot.pause()
        assert not isinstance(app.screen, HelpScreen)


@run_async
async def test_series_settings_are_checked_by_the_procedure_rules():
    app = MfmApp(None)
    async with app.run_test(size=SIZE) as pilot:
        sv = series_form(app, heights="20,10")
        await pilot.press("4")
        await pilot.click("#series-check")
        await pilot.pause()
        assert "strictly increasing" in str(sv.query_one("#series-message").render())
        sv.query_one("#s-heights").value = "10,20"
        sv.query_one("#s-pixels").value = "4"
        await pilot.pause()  # let the inputs post their changes
        sv.query_one("#series-check").press()  # the same Pressed message a click posts, without aiming the mouse
        await pilot.pause()
        await pilot.pause()
        assert "below the minimum of 8" in str(sv.query_one("#series-message").render())


# ---- on the simulated stage --------------------------------------------------------------------------------
@run_async
async def test_calibration_shows_its_result_and_is_accepted(tmp_path):
    app = make_app(tmp_path)
    async with app.run_test(size=SIZE) as pilot:
        app.view("probe").query_one("#probe-name").value = "lever-T1"
        await pilot.click("#calibrate")
        await settle(app, pilot)
        cal = app.workflow.calibration
        assert cal is not None, app.view("log").entries
        result = str(app.view("probe").query_one("#probe-result").render())
        from assistant.formatting import quantity

        assert f"spring constant k  {quantity(cal.k_n_per_m, 'N/m', cal.k_std_n_per_m)}" in result
        assert cal.k_source in result and "Higgins" in result  # which path produced the number
        assert app.view("probe").fit is not None  # the "thermal fit" overlay arrived
        assert app.view("resonance").model is not None  # the sweep with its fitted response
        await pilot.click("#accept")
        await settle(app, pilot)
        history = ProbeRecord(tmp_path / "record").history("lever-T1")
        assert len(history) == 1 and history[0]["k_n_per_m"] == pytest.approx(cal.k_n_per_m)
        assert "probe lever-T1" in screen_text(app)


@pytest.mark.alone  # it times the UI thread: a parallel worker's test would take the CPU it measures
@run_async
async def test_short_series_fills_previews_and_matches_the_session_file(tmp_path):
    from assistant.storage.session_file import SessionFile

    lines = 128
    app = make_app(tmp_path)
    async with app.run_test(size=SIZE) as pilot:
        await calibrate_and_approach(app, pilot)
        # long enough to tick the timer about 50 times (64 lines gave 20-27 ticks, against the 20 required)
        sv = series_form(app, lines=lines, pixels=32)
        await pilot.press("4")
        # The simulated stage computes its magnetic maps on the first scan line (about 1 s of numpy work
        # that holds the GIL for up to ~110 ms at a time, measured); do that line first so the timer measures the
        # UI's own behaviour during the series.
        from assistant.procedures.series import line_spec

        await asyncio.to_thread(app.controller.scan_line, line_spec(sv.checked_settings(), 0))
        # A stall of the UI thread is a gap between timer ticks during which this process was running (its UI
        # thread busy, or the worker holding the GIL). When other programs on the machine take the CPU, the
        # process itself is not scheduled and the wall-clock gap says nothing about our code: count only the
        # part of each gap the process spent on the CPU (all threads together).
        gaps: list[float] = []
        stalls: list[float] = []
        last = [time.perf_counter(), time.process_time()]

        def tick():
            now, cpu = time.perf_counter(), time.process_time()
            if app.busy == "series":  # while the series runs (the click that mounts its views comes before)
                gaps.append(now - last[0])
                stalls.append(min(now - last[0], cpu - last[1]))
            last[0], last[1] = now, cpu

        # The test runner's own heap (hundreds of earlier tests) makes a full garbage collection take hundreds of
        # milliseconds, which would stop every thread: collect and freeze it first, as a fresh UI process has none.
        gc.collect()
        gc.freeze()
        timer = app.set_interval(0.01, tick)
        try:
            await pilot.click("#series-start")
            await settle(app, pilot)
        finally:
            timer.stop()
            gc.unfreeze()
        assert app.workflow.series_result.completed_lines == lines
        images = list(sv.query(HalfBlockImage))
        assert len(images) == 3
        for img in images:
            assert img._img.shape == (lines, 32) and np.isfinite(img._img).all()
        app.workflow.session.flush()
        with SessionFile.open(tmp_path / "session.h5", "r") as f:
            stored = f.read_series("series1").phase_deg
        np.testing.assert_allclose(sv.phase, stored)
        # The UI thread kept ticking while the series ran in its worker.
        print(f"UI timer: {len(gaps)} ticks, max gap {max(gaps) * 1e3:.1f} ms (of it on the CPU "
              f"{max(stalls) * 1e3:.1f} ms), median {np.median(gaps) * 1e3:.1f} ms")
        assert len(gaps) > 20 and max(stalls) < 0.1, f"UI stalled {max(stalls) * 1e3:.0f} ms over {len(gaps)} ticks"
        shown = screen_text(app)
        assert "4 nm" not in shown and "10 nm" in shown and f"series1 done: {lines} of {lines} lines" in shown


@run_async
async def test_withdraw_mid_series_leaves_the_stage_withdrawn(tmp_path):
    app = make_app(tmp_path)
    async with app.run_test(size=SIZE) as pilot:
        await calibrate_and_approach(app, pilot)
        sv = series_form(app, lines=64, pixels=32)
        app.start_series(sv.checked_settings())
        t0 = time.monotonic()
        while sv.lines_done < 1:
            assert time.monotonic() - t0 < 20
            await pilot.pause(0.02)
        await pilot.press("ctrl+g")
        await settle(app, pilot)
        assert app.controller.status().safe
        assert app.workflow.series_result is None  # the step ended by the cancel, not by finishing
        assert 1 <= sv.lines_done < 64
        levels = [lvl for lvl, text in app.view("log").entries if "confirmed by status" in text]
        assert levels == ["info"]
        assert "withdrawn" in screen_text(app)


@run_async
async def test_cancel_stops_the_series_through_its_guard(tmp_path):
    app = make_app(tmp_path)
    async with app.run_test(size=SIZE) as pilot:
        await calibrate_and_approach(app, pilot)
        sv = series_form(app, lines=64, pixels=32)
        app.start_series(sv.checked_settings())
        while sv.lines_done < 1:
            await pilot.pause(0.02)
        await pilot.press("ctrl+x")
        await settle(app, pilot)
        texts = [text for _, text in app.view("log").entries]
        assert "series: cancelled" in texts
        # the safety guard's notice says what it did; the cause ("cancelled") is said once, by the step
        assert "stopped: tip withdrawn, drive off, bias 0 V, field 0" in texts  # the default stage has a magnet
        assert app.controller.status().safe and sv.lines_done < 64


@run_async
async def test_quit_while_engaged_asks_withdraws_and_exits_0(tmp_path):
    app = make_app(tmp_path)
    async with app.run_test(size=SIZE) as pilot:
        await calibrate_and_approach(app, pilot)
        await pilot.pause(0.3)  # a status poll sees the engaged stage
        assert app.last_status.engaged
        await pilot.press("q")
        await pilot.pause()
        assert isinstance(app.screen, ConfirmQuit)
        await pilot.press("y")
        t0 = time.monotonic()
        while app.is_running and time.monotonic() - t0 < 10:
            await pilot.pause(0.05)
    assert app.return_code == 0
    assert app.controller.status().safe


@run_async
async def test_open_session_file_shows_series_and_analysis(tmp_path):
    from assistant.procedures.calibrate import CalibrationSettings
    from assistant.procedures.series import SeriesSettings
    from assistant.procedures.workflow import Workflow

    path = tmp_path / "done.h5"
    with open_controller("sim://", seed=5) as ctl:
        wf = Workflow(ctl, path)
        wf.calibrate(CalibrationSettings(probe_name="lever-O"))
        wf.approach()
        wf.series(SeriesSettings(heights_m=(10e-9, 20e-9, 40e-9), lines=8, pixels=16))
        analysis = wf.analyse().to_dict()
        wf.close()
    app = MfmApp(None, open_path=path)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause(0.4)
        sv = app.view("series")
        assert sv.lines_done == 8 and np.isfinite(sv.phase).all()
        assert "line 8 of 8" in screen_text(app) and "lever-O" in screen_text(app)
        await pilot.press("5")
        await pilot.pause(0.3)
        shown = screen_text(app)
        rec = analysis["recommended_lift_nm"]
        assert ("lift none" if rec is None else f"lift {rec:g} nm") in shown
        assert app.view("analysis").mean_phase is not None
        await pilot.press("q")  # no controller: quits at once
    assert app.return_code == 0


def test_cli_tui_open_missing_file_is_a_usage_error(tmp_path, capsys):
    from assistant.cli import main

    assert main(["tui", "--open", str(tmp_path / "missing.h5")]) == 2
    assert "does not exist" in capsys.readouterr().err


@run_async
async def test_bias_grid_lines_preview_the_first_bias():
    app = MfmApp(None)
    async with app.run_test(size=SIZE) as pilot:
        sv = app.view("series")
        sv.begin(heights_m=(10e-9, 20e-9), biases_v=(-0.5, 0.0, 0.5), lines=8, pixels=16)
        await pilot.press("4")
        await pilot.pause(0.2)
        phase = np.arange(2 * 3 * 16, dtype=float).reshape(2, 3, 16)
        app.post_message(ProcedureEvent(Progress("series", 1, 8, "lines", 0.5, 3.5, data={
            "row": 0, "phase_deg": phase, "topography_m": np.zeros(16), "heights_m": (10e-9, 20e-9)})))
        await pilot.pause(0.3)
        np.testing.assert_array_equal(sv.phase[:, 0, :], phase[:, 0, :])
        assert "previews at bias -0.5 V" in screen_text(app)


@run_async
async def test_redraw_waits_for_a_preview_half_rebuilt():
    """A redraw tick can fall while the previews are rebuilt (old ones half removed, new ones half mounted):
    it skips such a preview and draws it on a later tick, instead of ending the app with NoMatches."""
    app = MfmApp(None)
    async with app.run_test(size=SIZE) as pilot:
        sv = app.view("series")
        sv.begin(heights_m=(10e-9, 20e-9), biases_v=None, lines=4, pixels=8)
        await pilot.press("4")
        for _ in range(50):
            if len(sv.query(HalfBlockImage)) == 2:
                break
            await pilot.pause(0.05)
        first = sv.query_one("#preview-0")
        await first.query_one(HalfBlockImage).remove()  # as mid-rebuild: the preview without its image
        sv.redraw()
        assert sv._dirty  # the half-built preview asks for another tick
        await first.mount(HalfBlockImage())
        await pilot.pause(0.4)
        assert not sv._dirty
        assert all(img._img is not None for img in sv.query(HalfBlockImage))
