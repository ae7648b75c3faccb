"""What the views ask the app to do, and the thread workers that do it.

Every step runs one :class:`assistant.procedures.workflow.Workflow` method in a thread worker and posts a
:class:`~assistant.tui.bridge.StepFinished` message when it ends; the withdraw key, the status poller, the probe
record and the offline analysis of a session file have workers of their own. Mixed into
:class:`assistant.tui.app.MfmApp`, which holds the workflow, the controller and the views.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

from textual import work

from assistant.procedures.events import CancelToken, Notice
from assistant.tui.bridge import ProcedureEvent, StatusChanged, StepFinished, WithdrawDone
from assistant.tui.view_base import FieldError


#: the steps that move the stage (their failures end with a stop, whatever failed)
MOVING_STEPS = frozenset({"calibrate", "approach", "series", "field series"})

class StepRunner:
    """The steps and workers of the app (a mixin of :class:`~assistant.tui.app.MfmApp`)."""

    def end_steps(self) -> None:
        """The app is ending: close the session file, or first stop a step that is still running.

        Only an unexpected end leaves a step running (a fault in the UI's code, the terminal gone): quitting waits
        for a safe, idle stage. The step is cancelled and the stage made safe now, as the withdraw key does; left
        alone, the step would scan on to its end with no screen and no withdraw key. Its thread then ends through
        its guard, and ``mfma tui`` closes the session after the app.
        """
        if self.busy is None:
            self.workflow.close()
            return
        self.workflow.cancel.set()
        try:
            self.workflow.withdraw()
        except Exception:  # no screen to tell: `mfma tui` checks the stage after the app and reports from there
            pass

    def end_on_termination(self) -> None:
        """SIGTERM (``kill``) or SIGHUP (the terminal closed) ends the app through :meth:`end_steps`, which stops a
        running step and makes the stage safe; Python's default would end the process at once, the stage as it
        was. Only where the app runs the main thread's event loop (signal handlers live there)."""
        import asyncio
        import functools
        import signal

        loop = asyncio.get_running_loop()
        for name in ("SIGTERM", "SIGHUP"):
            try:  # exit status 130, as `mfma` gives after Ctrl-C
                loop.add_signal_handler(getattr(signal, name), functools.partial(self.exit, return_code=130))
            except (AttributeError, RuntimeError, ValueError):  # no such signal here, or not the main thread
                return

    # ---- intents from the views --------------------------------------------------------------------------
    def _run(self, step: str, fn) -> bool:
        if self.workflow is None:
            self.say("error", f"{step}: no controller (viewing a session file)")
            return False
        if self.busy:
            self.say("warning", f"{step}: {self.busy} is still running; cancel it first (ctrl+x)")
            return False
        self.busy = step
        self.workflow.cancel = CancelToken()  # a fresh token: the last cancel must not stop this step
        self._step_worker(step, fn)
        self._update_status_line()
        return True

    def start_calibration(self) -> None:
        from assistant.procedures.calibrate import CalibrationError

        res = self.view("resonance")
        try:
            settings = self.view("probe").calibration_settings(free_amplitude_m=res.free_amplitude_m(),
                                                               setpoint_ratio=res.setpoint_ratio())
            settings.validate()
        except (FieldError, CalibrationError) as exc:
            self.say("error", f"calibration: {exc}")
            return
        wf = self.workflow
        if self._run("calibrate", lambda: wf.calibrate(settings)):
            self._calibration_settings = settings
            self.probe_name = settings.probe_name
            self._update_status_line()

    def accept_calibration(self) -> None:
        wf = self.workflow
        settings = getattr(self, "_calibration_settings", None)
        if wf is None or wf.calibration is None or settings is None:
            self.say("error", "accept: no calibration of this session to record")
            return
        name = settings.probe_name or self.view("probe").text("probe-name")
        if not name:  # the calibration stands; it only needs a name to be filed under
            self.view("probe").ask_for_name()
            return
        self.probe_name = name
        self._update_status_line()
        from assistant.procedures.workflow import calibration_scalars  # the workflow loads once a step runs

        self._record_worker(name, calibration_scalars(wf.calibration, name))

    def start_approach(self) -> None:
        wf = self.workflow
        self._run("approach", lambda: wf.approach())

    def validate_series(self, settings):
        """The checks ``mfma run`` makes before the stage moves (limits, capabilities, a free series name);
        returns the plan, which says what the series will give."""
        from assistant.procedures.preflight import check_series_plan

        return check_series_plan(settings, limits=self.limits, controller=self.controller,
                                 existing_series=self.series_names(), approach=False)

    def series_names(self) -> list[str]:
        """Series already in the session file (none before the first step wrote it)."""
        wf = self.workflow
        return wf.session.series_names() if wf is not None and wf.session_path.exists() else []

    def start_series(self, settings) -> None:
        from assistant.procedures.preflight import free_series_name

        wf = self.workflow
        if wf is not None:  # every series of the session gets its own group: series1, series2, ...
            settings = dataclasses.replace(settings, name=free_series_name(self.series_names()))
        if self._run("series", lambda: wf.series(settings)):
            self.view("series").begin(heights_m=settings.heights_m, biases_v=settings.biases_v,
                                      lines=settings.lines, pixels=settings.pixels, scan_size_m=settings.scan_size_m)

    def start_analysis(self) -> None:
        if self.workflow is None and self.open_path is not None:
            self._offline_worker("analyze", self.open_path)
            return
        wf = self.workflow
        self._run("analyze", lambda: wf.analyse())

    def start_field_map(self) -> None:
        """Quantitative MFM: map the series' stray field with the probe's stored TTF (see ``tui/field_map.py``)."""
        from assistant.tui.field_map import start_field_map

        start_field_map(self)

    def start_report(self) -> None:
        if self.workflow is None and self.open_path is not None:
            self._offline_worker("report", self.open_path)
            return
        from assistant.outputs import report_dir_for

        wf = self.workflow
        out = report_dir_for(self.session_path)

        def report():
            from assistant.report.summary import build_report

            wf.session.flush()  # the report reads the session file; the workflow keeps it open for writing
            return build_report(wf.session_path, out)

        self._run("report", report)

    # ---- workers --------------------------------------------------------------------------------------------
    @work(thread=True, group="procedure", exit_on_error=False)
    def _step_worker(self, step: str, fn) -> None:
        try:
            result = fn()
        except BaseException as exc:
            # a running procedure's guard has made the stage safe, but not a failure around it with the tip
            # engaged (the approach's record written after its guard ended, a series' file before it began);
            # the steps that only read or write files leave the stage as it is
            if self.controller is not None and step in MOVING_STEPS:
                from assistant.procedures.guard import stop_now

                try:
                    stop_now(self.controller)
                except Exception as stop_exc:
                    self.post_message(StepFinished(step, None, RuntimeError(
                        f"{exc}; and the stage could not be confirmed safe ({stop_exc}): check the instrument")))
                    return
            self.post_message(StepFinished(step, None, exc))
            return
        self.post_message(StepFinished(step, result))

    @work(thread=True, group="safety", exit_on_error=False)
    def _withdraw_worker(self) -> None:
        from drivers.base import Capability

        try:
            self.workflow.withdraw()
            status = self.controller.status()
            field_off = True
            if Capability.APPLIED_FIELD in getattr(self.controller, "capabilities", ()):  # the magnet's sensor
                field_off = abs(self.controller.read_field()) <= 0.01 * self.controller.limits.field_max_a_per_m
        except Exception as exc:
            self.post_message(WithdrawDone(None, f"{type(exc).__name__}: {exc}"))
            return
        self.post_message(StatusChanged(status))
        self.post_message(WithdrawDone(status.safe and field_off))

    @work(thread=True, group="poll", exit_on_error=False)
    def _poll_worker(self) -> None:
        while not self._stop_poll.wait(self.poll_interval_s):
            if not self.is_running or self._closed:  # the app ended without unmounting cleanly (a crash)
                return
            try:
                status = self.controller.try_status(0.05)
            except Exception as exc:
                self.post_message(StatusChanged(None, f"{type(exc).__name__}: {exc}"))
                continue
            if status is not None:
                self.post_message(StatusChanged(status))

    @work(thread=True, group="record", exit_on_error=False)
    def _record_worker(self, name: str, entry: dict) -> None:
        try:
            record = self._probe_record
            if record is None:
                from assistant.storage.probe_record import ProbeRecord

                record = ProbeRecord()
            warnings = record.add(name, entry)
        except Exception as exc:
            self.post_message(ProcedureEvent(Notice("error", f"probe record: {exc}")))
            return
        for w in warnings:
            self.post_message(ProcedureEvent(Notice("warning", f"probe record: {w}")))
        self.post_message(ProcedureEvent(Notice("info", f"probe record: calibration of {name!r} stored")))
        self.call_from_thread(self.view("probe").set_accepted, f"Stored in the probe record as {name!r}.")

    @work(thread=True, group="procedure", exit_on_error=False)
    def _offline_worker(self, step: str, path: Path, *extra) -> None:
        try:
            if step == "field map":
                from assistant.tui.field_map import offline_field_map

                result = offline_field_map(path, *extra)
            elif step == "analyze":
                from assistant.procedures.analyse import analyse_session_file

                result = analyse_session_file(path, None)
            else:
                from assistant.outputs import report_dir_for
                from assistant.report.summary import build_report

                result = build_report(path, report_dir_for(path))
        except Exception as exc:
            self.post_message(StepFinished(step, None, exc))
            return
        self.post_message(StepFinished(step, result))
