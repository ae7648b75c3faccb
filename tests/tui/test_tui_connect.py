"""The controller opened after the first screen (``MfmApp(None, connect=...)``, what ``mfma tui`` does)."""

from __future__ import annotations

import asyncio
import time

from assistant.storage.probe_record import ProbeRecord
from assistant.tui.app import MfmApp
from drivers.registry import open_controller


async def _until(pilot, condition, timeout_s: float = 20.0) -> None:
    t0 = time.monotonic()
    while not condition():
        assert time.monotonic() - t0 < timeout_s
        await pilot.pause(0.05)


def test_the_screen_comes_first_then_the_controller_and_the_workflow(tmp_path):
    opened, live = [], []

    def connect():
        opened.append(open_controller("sim://", seed=3))
        return opened[-1]

    class App(MfmApp):
        def controller_live(self):
            live.append(True)
            super().controller_live()

    async def scenario():
        app = App(None, session_path=tmp_path / "s.h5", probe_record=ProbeRecord(tmp_path / "rec"), connect=connect)
        async with app.run_test(size=(80, 24)) as pilot:
            assert app.controller is None and app.connecting  # drawn before the controller opens
            await _until(pilot, lambda: live != [])
            assert app.controller.inner is opened[0] and app.workflow is not None and not app.connecting
            assert app.query_one("#withdraw-button").display and live == [True]
        assert app.connection_result(timeout_s=5) is opened[0]
        app.workflow.close()
        opened[0].close()

    asyncio.run(scenario())


def test_a_controller_that_cannot_open_ends_the_app_and_raises_its_error(tmp_path):
    def connect():
        raise ConnectionRefusedError("no answer from the controller")

    async def scenario():
        app = MfmApp(None, session_path=tmp_path / "s.h5", probe_record=ProbeRecord(tmp_path / "rec"), connect=connect)
        async with app.run_test(size=(80, 24)) as pilot:
            await _until(pilot, lambda: not app.is_running or app._connect_error is not None)
            await pilot.pause(0.2)
        return app

    app = asyncio.run(scenario())
    try:
        app.connection_result(timeout_s=5)
    except ConnectionRefusedError as exc:
        assert "no answer" in str(exc)
    else:
        raise AssertionError("the error of opening was not raised")
    assert app.controller is None and app.workflow is None
