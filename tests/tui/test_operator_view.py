"""What the operator sees and types: each item the terminal UI must get right, headless at 80 x 24 (series tiny)."""

from __future__ import annotations

import time

import numpy as np

from assistant.procedures.events import Progress
from assistant.tui.app import MfmApp
from assistant.tui.bridge import ProcedureEvent
from assistant.tui.screens import HELP, WITHDRAW_KEY, HelpScreen
from assistant.tui.widgets import HalfBlockImage
from tests.tui.test_tui_app import (SIZE, calibrate_and_approach, make_app, run_async, screen_text, series_form,
                                    settle)


@run_async
async def test_focused_field_shows_what_is_typed_and_heights_read_in_full():
    app = MfmApp(None)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.click("#probe-name")
        await pilot.press(*"lever-Q7")
        await pilot.pause(0.2)
        shown = screen_text(app)
        assert "lever-Q7" in shown and "▔▔▔" not in shown  # the text, not an empty frame
        await pilot.press("escape", "4")
        await pilot.pause(0.2)
        heights = app.view("series").query_one("#s-heights")
        heights.value = "5,20,30,50,75,100,150,200"
        heights.cursor_position = len(heights.value)  # scrolled to its end, as after typing
        await pilot.pause(0.3)
        echo = app.view("series").query_one("#s-heights-echo")
        assert str(echo.render()) == "8 heights: 5, 20, 30, 50, 75, 100, 150, 200 nm"
        assert echo.region.height >= 1 and "8 heights: 5," in screen_text(app)  # on screen, the whole list


@run_async
async def test_view_keys_work_after_a_button_and_help_says_what_esc_does():
    app = MfmApp(None)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("5")
        await pilot.click("#analyse")  # a button keeps the focus after the click
        await pilot.pause(0.2)
        await pilot.press("1")
        await pilot.pause(0.2)
        assert app.query_one("TabbedContent").active == "probe"
        await pilot.press("question_mark")
        await pilot.pause(0.2)
        assert isinstance(app.screen, HelpScreen)
        assert "esc     leave the field you are typing in" in HELP and WITHDRAW_KEY in screen_text(app)
        assert "ctrl+w" not in HELP.replace("browser", "")  # the old key is gone (it closes browser tabs)


@run_async
async def test_plots_have_units_and_the_log_wraps():
    app = MfmApp(None)
    async with app.run_test(size=SIZE) as pilot:
        f = np.linspace(7.1e4, 7.9e4, 500)
        psd = 1e-12 + 1e-9 / (1 + ((f - 7.5e4) / 400) ** 2)
        app.post_message(ProcedureEvent(Progress("thermal fit", 1, 1, "fit", 0.1, data={
            "frequency_hz": f, "psd_v2_per_hz": psd, "model_v2_per_hz": psd, "f0_hz": 7.5e4, "q": 200.0})))
        app.view("analysis").show({"heights_nm": [10, 20, 40], "magnetic_rms_deg": [1.0, 0.6, 0.3],
                                   "electrostatic_mean_deg": [-0.5, -0.4, -0.3], "short_range_mean_deg": [-1, -.2, 0],
                                   "recommended_lift_nm": 20.0, "cpd_v": None}, mean_phase_deg=[-1.5, -0.6, -0.3])
        long = "a long notice " + "word " * 30 + "END"
        app.say("info", long)
        await pilot.pause(0.3)
        probe = screen_text(app)
        assert "frequency (Hz)" in probe and "PSD (V²/Hz)" in probe and "74k" in probe  # ticks inside the window
        assert "measured" not in probe  # no legend box on the data
        await pilot.press("5")
        await pilot.pause(0.3)
        shown = screen_text(app)
        assert "lift height (nm)" in shown and "phase (°)" in shown and "rms (°)" in shown
        # the side text keeps a gap before the plots' tick labels
        side, plot = app.view("analysis").query_one("#an-side"), app.view("analysis").query_one("#an-mean")
        assert side.styles.padding.right >= 1 and side.region.right <= plot.region.x
        await pilot.press("6")
        await pilot.pause(0.3)
        assert "END" in screen_text(app)  # wrapped onto the next row, not cut off at the edge


@run_async
async def test_previews_grow_with_the_terminal():
    widths = []
    for size in (SIZE, (160, 48)):
        app = MfmApp(None)
        async with app.run_test(size=size) as pilot:
            sv = app.view("series")
            await pilot.press("4")
            sv.begin(heights_m=(10e-9, 20e-9, 40e-9), biases_v=None, lines=8, pixels=16)
            await pilot.pause(0.4)
            img = sv.query(HalfBlockImage).first()
            widths.append((img.size.width, img.size.height))
            labels = [str(lbl.render()) for lbl in sv.query("Preview > Label")]
            assert labels == ["10 nm", "20 nm", "40 nm"]
    assert widths[1][0] > 1.5 * widths[0][0] and widths[1][1] > widths[0][1], widths


@run_async
async def test_second_series_gets_its_own_group_and_a_stop_message_stays(tmp_path):
    app = make_app(tmp_path)
    async with app.run_test(size=SIZE) as pilot:
        await calibrate_and_approach(app, pilot)
        sv = series_form(app, heights="10,20,40", lines=8, pixels=16)
        for _ in range(2):
            app.start_series(sv.checked_settings())
            await settle(app, pilot)
        assert app.workflow.session.series_names() == ["series1", "series2"]
        assert "series2 done: 8 of 8 lines" in str(sv.query_one("#series-status").render())
        # a withdraw mid-series: the stop message is not replaced by the next redraw of the progress
        sv = series_form(app, heights="10,20,40", lines=48, pixels=16)
        app.start_series(sv.checked_settings())
        t0 = time.monotonic()
        while sv.lines_done < 2:
            assert time.monotonic() - t0 < 20
            await pilot.pause(0.02)
        await pilot.press(WITHDRAW_KEY)
        await settle(app, pilot)
        await pilot.pause(0.4)  # several redraw periods
        status = str(sv.query_one("#series-status").render())
        assert status.startswith(f"series stopped after {sv.lines_done} lines"), status
        assert app.controller.status().safe
        texts = [t for _, t in app.view("log").entries]
        # the cause said once, by the step; the guard's notice says only what it did
        assert texts.count("series: cancelled") == 1 and not any(t.startswith("stopped (") for t in texts)


@run_async
async def test_one_z_and_accept_asks_for_the_name(tmp_path):
    app = make_app(tmp_path)
    async with app.run_test(size=SIZE) as pilot:
        await calibrate_and_approach(app, pilot, name="")
        await pilot.pause(0.4)  # a status poll
        z = app.last_status.z_m
        await pilot.press("3")
        await pilot.pause(0.3)
        shown = screen_text(app)
        from assistant.formatting import quantity

        assert shown.count(f"Z {quantity(z, 'm')}") >= 2, shown  # the header and the Approach view agree
        await pilot.press("1")
        await pilot.click("#accept")
        await pilot.pause(0.3)
        assert app.focused is app.view("probe").query_one("#probe-name")
        assert "Name the probe" in str(app.view("probe").query_one("#probe-hint").render())
        assert not any("calibrate again" in t for _, t in app.view("log").entries)
        await pilot.press(*"lever-N")
        await pilot.click("#accept")
        await settle(app, pilot)
        from assistant.storage.probe_record import ProbeRecord

        assert len(ProbeRecord(tmp_path / "record").history("lever-N")) == 1


@run_async
async def test_open_mode_is_read_only_with_the_files_own_values(tmp_path):
    from assistant.procedures.calibrate import CalibrationSettings
    from assistant.procedures.series import SeriesSettings
    from assistant.procedures.workflow import Workflow
    from assistant.tui.session_view import load_session

    path = tmp_path / "session-20260101T000000Z.h5"
    from drivers.registry import open_controller

    with open_controller("sim://", seed=5) as ctl:
        wf = Workflow(ctl, path)
        wf.calibrate(CalibrationSettings(probe_name="lever-O", temperature_k=299.0))
        wf.approach()
        wf.series(SeriesSettings(heights_m=(12e-9, 25e-9, 50e-9), lines=8, pixels=16, scan_size_m=3e-6))
        wf.analyse()
        wf.close()
    report = tmp_path / "report-20260101T000000Z"  # as mfma report names it
    report.mkdir()
    (report / "summary.md").write_text("# Session report\n")
    app = MfmApp(None, open_path=path, stored=load_session(path))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause(0.5)
        sv = app.view("series")
        assert sv.query_one("#s-heights").value == "12,25,50" and sv.query_one("#s-size").value == "3"
        assert all(i.disabled for i in app.query("Input"))
        for button in ("#calibrate", "#accept", "#approach-start", "#series-start", "#series-check"):
            assert not app.query_one(button).display, button
        assert app.view("probe").fit is not None and app.view("resonance").model is not None
        assert "read-only" in screen_text(app)
        await pilot.press("5")
        await pilot.pause(0.3)
        assert "report-20260101T000000Z" in screen_text(app) and "not written yet" not in screen_text(app)
        await pilot.press("2")
        await pilot.pause(0.3)
        assert "frequency (kHz)" in screen_text(app)


def test_open_of_a_file_that_is_not_a_session_exits_2_before_any_screen(tmp_path, capsys):
    from assistant.cli import main

    notes = tmp_path / "notes.txt"
    notes.write_text("not a session\n")
    assert main(["tui", "--open", str(notes)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"mfma: error: {notes} is not a session file written by mfma"]


def test_the_command_line_help_names_the_keys_the_app_binds():
    # `mfma tui --help` is what an operator may read before the first session: its withdraw key and view keys
    # must be the ones bound (it once said f2 and 1-6 while the app bound ctrl+g and 1-7)
    from assistant.cli.parser import build_parser
    from assistant.tui.app import VIEWS

    text = " ".join(build_parser()._subparsers._group_actions[0].choices["tui"].description.split())
    assert f"{WITHDRAW_KEY} withdraws the tip" in text and f"1-{len(VIEWS)} switch views" in text
    bound = {b.key for b in MfmApp.BINDINGS}
    assert WITHDRAW_KEY in bound and {str(i + 1) for i in range(len(VIEWS))} <= bound
