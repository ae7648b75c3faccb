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


def shown_whole(message) -> bool:
    """Whether a message widget shows every line its text needs (a max-height clips the rest unseen)."""
    region = message.content_region
    return region.height >= message.get_content_height(region.size, message.app.size, region.width)


@tui.run_async
async def test_the_check_message_is_shown_whole_in_a_small_terminal():
    # 80 x 24: the default plan's sentence needs six lines of the form's width; three were shown and the rest,
    # what the series gives, was cut without a sign
    app = MfmApp(None)
    async with app.run_test(size=(80, 24)) as pilot:
        await pilot.press("4")
        sv = app.view("series")
        sv.query_one("#series-check").press()
        await pilot.pause()
        await pilot.pause()
        message = sv.query_one("#series-message")
        assert str(message.render()).startswith("ok:") and shown_whole(message)
