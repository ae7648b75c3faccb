"""The Fields view, headless at 80 x 24: settings checked against the magnet, a short field series on the
simulated dot array with the loop growing step by step, and a stored field series opened for viewing."""

from __future__ import annotations

import sys
import time
from importlib import resources
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from test_tui_app import SIZE, run_async, screen_text  # noqa: E402
from test_tui_series_plan import shown_whole  # noqa: E402

from assistant.procedures.approach import ApproachSettings, approach  # noqa: E402
from assistant.tui.app import MfmApp  # noqa: E402
from drivers.registry import open_controller  # noqa: E402

DOT_LOOP = resources.files("simulated_stage").joinpath("scenarios/dot-loop.toml").read_text()


def _engaged_app(tmp_path: Path) -> MfmApp:
    scenario = tmp_path / "dots.toml"
    scenario.write_text(DOT_LOOP.replace("extent_um = 6.0", "extent_um = 3.0"))
    ctl = open_controller("sim://", scenario=str(scenario), seed=2)
    ctl.set_drive(85e3, 0.2)
    free = ctl.read(["amplitude_v"])["amplitude_v"]
    result = approach(ctl, ApproachSettings(85e3, 0.2, 0.7 * free, free))
    app = MfmApp(ctl, session_path=tmp_path / "session.h5", poll_interval_s=0.1)
    app.workflow.approach_result = result  # engaged by hand: the view's part starts here
    return app


def _form(view, **values) -> None:
    for key, value in values.items():
        view.query_one(f"#f-{key}").value = value


async def _finish(app, pilot, timeout_s: float = 60.0) -> None:
    t0 = time.monotonic()
    while app.busy or any(not w.is_finished for w in app.workers if w.group in ("procedure", "loop-preview")):
        assert time.monotonic() - t0 < timeout_s, f"{app.busy} did not finish"
        await pilot.pause(0.05)
    await pilot.pause(0.4)


@run_async
async def test_field_series_in_the_view_grows_its_loop_and_opens_stored(tmp_path):
    app = _engaged_app(tmp_path)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("7")
        view = app.view("fields")
        _form(view, fields="700:-700:100")
        await pilot.pause()
        view.query_one("#fields-check").press()
        await pilot.pause(0.2)
        assert "magnet's limit of 600 kA/m" in str(view.query_one("#fields-message").render())
        _form(view, fields="-450:450:50")  # a series from the negative end: its turning point is the top
        await pilot.pause()
        view.query_one("#fields-check").press()
        await pilot.pause(0.2)
        assert "fields -450 kA/m … 450 kA/m … -450 kA/m (37 steps)" in str(view.query_one("#fields-message").render())
        assert shown_whole(view.query_one("#fields-message"))  # all of it; the form scrolls where it is longer
        _form(view, fields="450:-450:225", lines="12", pixels="16", size="1.5")
        await pilot.pause()
        seen: list[int] = []
        view.query_one("#fields-start").press()
        t0 = time.monotonic()
        while app.busy != "field series":
            assert time.monotonic() - t0 < 10, "the series did not start"
            await pilot.pause(0.02)
        while app.busy or any(not w.is_finished for w in app.workers if w.group == "loop-preview"):
            if view.loop is not None and (not seen or view.loop.field_a_per_m.size != seen[-1]):
                seen.append(view.loop.field_a_per_m.size)  # the loop of the steps so far
            assert time.monotonic() - t0 < 60, app.view("log").entries[-3:]
            await pilot.pause(0.05)
        await pilot.pause(0.4)
        seen.append(view.loop.field_a_per_m.size)
        assert len(set(seen)) >= 2 and seen == sorted(seen) and seen[0] >= 3 and seen[-1] == 9  # it grew
        text = screen_text(app)
        assert "tip reversed at: -225, 225 kA/m" in text, text
        assert "field series fields1 done: 9 field steps" in text
        assert abs(app.controller.read_field()) < 1e3  # the field is back at zero (sensor noise 50 A/m)
        app.workflow.close()
    viewer = MfmApp(None, open_path=tmp_path / "session.h5")
    async with viewer.run_test(size=SIZE) as pilot:
        await _finish(viewer, pilot)
        view = viewer.view("fields")
        assert view.steps_done == 9 and view.loop is not None
        assert "tip reversed at: -225, 225 kA/m" in screen_text(viewer)
