"""The series view checks its settings with the function ``mfma run`` uses before the stage moves, accepts one
lift height and says what the series will give."""

from __future__ import annotations

from assistant.tui.app import MfmApp
from tests.tui import test_tui_app as tui


@tui.run_async
async def test_one_height_is_accepted_and_says_what_it_gives():
    app = MfmApp(None)
    async with app.run_test(size=tui.SIZE) as pilot:
        sv = tui.series_form(app, heights="30")
        await pilot.press("4")
        sv.query_one("#s-biases").value = "-0.5,0,0.5"
        await pilot.pause()
        sv.query_one("#series-check").press()
        await pilot.pause()
        await pilot.pause()
        shown = str(sv.query_one("#series-message").render())
        assert shown.startswith("ok:") and "V_cpd from 3 biases" in shown, shown
        assert sv.settings().name == "series1"  # no session file yet: the first free name
        sv.query_one("#s-biases").value = "-9,0,1"
        await pilot.pause()
        sv.query_one("#series-check").press()
        await pilot.pause()
        await pilot.pause()
        assert "software limit" in str(sv.query_one("#series-message").render())
