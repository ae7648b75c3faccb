"""The terminal UI: watch calibration, approach and the lift-height series as they run, with one key that
always pulls the tip back.

Thin by design: every step is a :class:`assistant.procedures.workflow.Workflow` method (the same code path as
``mfma run``), run in a thread worker (:mod:`assistant.tui.steps`); its events reach the UI thread as messages.
The controller is shared by the running step, the status poller and the withdraw key through
:class:`SerialisedController`; the withdraw key's ``abort()`` goes past its lock and stops the controller call in
flight. This module is the app itself: layout, messages, status line and keys.
"""

from __future__ import annotations

import threading
from pathlib import Path

from textual import on
from textual.app import App
from textual.binding import Binding
from textual.containers import Horizontal
from textual.widgets import Button, Footer, Static, TabbedContent, TabPane

from assistant.errors import InputError
from assistant.formatting import quantity
from assistant.procedures.events import Cancelled, Notice
from assistant.tui.bridge import ProcedureEvent, StatusChanged, StepFinished, WithdrawDone
from assistant.tui.connect import DeferredConnection
from assistant.tui.fields_actions import FieldSeriesActions
from assistant.tui.screens import WITHDRAW_KEY, ConfirmQuit, HelpScreen
from assistant.tui.session_view import load_session
from assistant.tui.steps import StepRunner
from assistant.tui.view_analysis import AnalysisView
from assistant.tui.view_approach import ApproachView
from assistant.tui.view_fields import FieldSeriesView
from assistant.tui.view_log import LogView
from assistant.tui.view_probe import ProbeView
from assistant.tui.view_resonance import ResonanceView
from assistant.tui.view_series import SeriesView
from drivers.errors import Aborted

VIEWS = (("probe", "Probe", ProbeView), ("resonance", "Resonance", ResonanceView),
         ("approach", "Approach", ApproachView), ("series", "Series", SeriesView),
         ("analysis", "Analysis", AnalysisView), ("log", "Log", LogView), ("fields", "Fields", FieldSeriesView))


class MfmApp(DeferredConnection, FieldSeriesActions, StepRunner, App[int]):
    """``MfmApp(controller, session_path=...)`` for a live session; ``MfmApp(None, open_path=...)`` to view a
    session file. ``probe_record`` is a :class:`ProbeRecord` (default: the user's). ``connect`` (instead of a
    controller) opens one after the first screen (:mod:`assistant.tui.connect`)."""

    TITLE = "mfm-assistant"
    CSS = """
    #status-bar { height: 2; background: $boost; }
    #status { height: 2; width: 1fr; padding: 0 1; }
    #withdraw-button { height: 2; min-width: 12; border: none; margin: 0; text-style: bold; }
    TabbedContent { height: 1fr; }
    TabPane { padding: 0 1; }
    .buttons { height: 1; margin: 0 0 1 0; }
    .buttons Button { height: 1; min-width: 10; border: none; margin: 0 1 0 0; }
    """
    BINDINGS = [
        # The withdraw key works in every view and also while typing in a field (priority): a control chord that
        # terminals send as one ASCII code, that no browser reserves (unlike ctrl+w, which closes a browser tab)
        # and that no field uses for editing; the Withdraw button in the status bar does the same.
        Binding(WITHDRAW_KEY, "withdraw", "WITHDRAW", priority=True),
        Binding("ctrl+x", "cancel", "cancel", priority=True),
        *[Binding(str(i + 1), f"view('{key}')", title, show=False) for i, (key, title, _) in enumerate(VIEWS)],
        Binding("question_mark", "help", "help"),
        Binding("q", "quit", "quit"),
        Binding("ctrl+q", "quit", "quit", priority=True, show=False),
        Binding("escape", "leave_field", "leave field", show=False),
    ]

    def __init__(self, controller=None, *, controller_url: str = "sim://", session_path: Path | None = None,
                 open_path: Path | None = None, limits=None, probe_record=None, scenario_text: str | None = None,
                 poll_interval_s: float = 0.25, stored=None, connect=None) -> None:
        super().__init__()
        from assistant.procedures.guard import SafetyLimits
        from drivers.registry import redact

        self.controller = None
        self._connect = connect
        self.controller_url = redact(controller_url)
        self.limits = limits or SafetyLimits()
        self.open_path = Path(open_path) if open_path else None
        self._stored = stored  # a StoredSession already read (mfma tui --open checks the file before the UI)
        self.session_path = Path(session_path) if session_path else None
        self._probe_record = probe_record
        self.poll_interval_s = poll_interval_s
        self.workflow = None
        if (controller is not None or connect is not None) and self.session_path is None:
            raise InputError("a live session needs session_path")
        if controller is not None:
            self.attach_controller(controller, scenario_text=scenario_text)
        self.busy: str | None = None
        self.last_status = None
        self.status_error: str | None = None
        self.probe_name: str | None = None
        self._stop_poll = threading.Event()
        self._quit_pending = False
        self._withdraw_confirmed = False

    # ---- layout ------------------------------------------------------------------------------------------
    def compose(self):
        with Horizontal(id="status-bar"):
            yield Static("", id="status")
            withdraw = Button("Withdraw", id="withdraw-button", variant="error")
            withdraw.can_focus = False  # a click or the key, never a stray enter after tab
            yield withdraw
        with TabbedContent(initial="probe"):
            for i, (key, title, cls) in enumerate(VIEWS):
                with TabPane(f"{i + 1} {title}", id=key):
                    yield cls(id=f"view-{key}")
        yield Footer()

    def view(self, key: str):
        return self.query_one(f"#view-{key}")

    @property
    def views(self):
        return [self.view(key) for key, _, _ in VIEWS]

    def on_mount(self) -> None:
        self.end_on_termination()
        if self.controller is None and self._connect is None:
            self.query_one("#withdraw-button").display = False  # a stored session: nothing to withdraw
        if self.controller is not None:
            self.controller_live()
        elif self._connect is not None:
            self.start_connecting()
        if self.open_path is not None:
            self._show_session_file(self.open_path)
        self._update_status_line()

    def on_unmount(self) -> None:
        self._stop_poll.set()
        if self.workflow is not None:
            self.end_steps()

    # ---- messages from workers -----------------------------------------------------------------------
    def on_procedure_event(self, message: ProcedureEvent) -> None:
        ev = message.event
        if isinstance(ev, Notice):
            # the guard's stop notice repeats the error the step reports when it ends: say only what it did
            self.say(ev.level, f"stopped: {safe_words(self.controller)}" if ev.kind == "stopped" else ev.text)
            return
        for view in self.views:
            if ev.what in view.EVENTS:
                view.progress(ev)

    def on_step_finished(self, message: StepFinished) -> None:
        self.busy = None
        step, err = message.step, message.error
        if err is None:
            self.say("info", f"{step}: done")
        elif isinstance(err, (Cancelled, Aborted)):
            self.say("warning", f"{step}: cancelled")
        else:
            self.say("error", f"{step} failed: {str(err).strip() or type(err).__name__}")
        for view in self.views:
            view.step_finished(step, message.result, err)
        self._update_status_line()
        self._maybe_finish_quit()

    def on_status_changed(self, message: StatusChanged) -> None:
        if message.status is not None:
            self.last_status = message.status
            for view in self.query("#view-approach"):  # none while the app shuts down
                view.show_status(message.status)
        self.status_error = message.error
        self._update_status_line()

    def on_withdraw_done(self, message: WithdrawDone) -> None:
        if message.error:
            self.say("error", f"withdraw: {message.error}; check the instrument by hand")
        elif message.safe:
            words = safe_words(self.controller)
            how = "status and the field reading" if words.endswith("field 0") else "status"
            self.say("info", f"withdrawn: {words} (confirmed by {how})")
        else:
            self.say("error", "withdraw sent but status does not report a safe stage; check the instrument")
        self._withdraw_confirmed = bool(message.safe)
        if self._quit_pending and not message.safe:
            self._quit_pending = False
        self._maybe_finish_quit()

    # ---- status line ---------------------------------------------------------------------------------------
    def _update_status_line(self) -> None:
        st = self.last_status
        if self.controller is None:
            state, z, bias = ("[b]connecting…[/b]" if self.connecting else "[b]no controller[/b]"), "", ""
        elif st is None:
            state, z, bias = "state ?", "", ""
        else:
            if st.engaged:
                state = "[b reverse] ENGAGED [/]"
            elif st.safe:
                state = "[b]withdrawn[/b]"
            else:
                state = "[b reverse] NOT SAFE [/]"
            z, bias = f"Z {quantity(st.z_m, 'm')}", f"bias {st.bias_v:+.2f} V"
        probe = self.probe_name or "—"
        first = " │ ".join(p for p in (self.controller_url if self.controller else "", f"probe {probe}", state, z,
                                      bias) if p)
        path = self.open_path or self.session_path
        run = f"[b]running: {self.busy}[/b] (ctrl+x cancel) │ " if self.busy else ""
        if self.controller is None and self.open_path is not None:
            run = "[b]read-only[/b] │ "
        err = f"status: {self.status_error} │ " if self.status_error else ""
        second = f"{run}{err}session {path.name if path else '—'}"
        for status in self.query("#status").results(Static):  # none while the app shuts down
            status.update(f"{first}\n{second}")

    def say(self, level: str, text: str) -> None:
        self.view("log").add(level, text)
        if level in ("warning", "error"):
            self.notify(text, severity="error" if level == "error" else "warning", timeout=4)

    # ---- actions --------------------------------------------------------------------------------------------
    def action_view(self, key: str) -> None:
        # Leave the focused button first: a tabbed pane that keeps the focus switches itself back to its tab.
        if self.focused is not None:
            self.set_focus(None)
        self.query_one(TabbedContent).active = key

    @on(Button.Pressed, "#withdraw-button")
    def _withdraw_pressed(self, event: Button.Pressed) -> None:
        event.stop()
        self.action_withdraw()

    def action_help(self) -> None:
        if not isinstance(self.screen, HelpScreen):
            self.push_screen(HelpScreen())

    def action_leave_field(self) -> None:
        self.set_focus(None)

    def action_cancel(self) -> None:
        if self.workflow is not None and self.busy:
            self.workflow.cancel.set()
            self.say("warning", f"cancel requested: {self.busy} stops at its next check and withdraws")

    def action_withdraw(self) -> None:
        if self.controller is None and self.connecting:
            self._withdraw_on_connect = True  # nothing commanded yet; withdraw the moment the controller opens
            self.say("warning", "connecting: the withdraw follows as soon as the controller is open")
            return
        if self.controller is None:
            self.say("warning", "no controller: nothing to withdraw")
            return
        self.workflow.cancel.set()  # a running step stops at its next check; its guard withdraws too
        self._withdraw_worker()

    async def action_quit(self) -> None:
        reason = self._engaged_reason()
        if reason is None:
            self._stop_poll.set()
            self.exit(0)
            return
        if not isinstance(self.screen, ConfirmQuit):
            self.push_screen(ConfirmQuit(reason), self._quit_answer)

    def _engaged_reason(self) -> str | None:
        if self.controller is None:
            return None
        if self.busy:
            return f"{self.busy} is running."
        st = self.last_status
        if st is None or not st.safe:
            return "The tip is engaged." if st is not None and st.engaged else "The stage is not known to be safe."
        return None

    def _quit_answer(self, yes: bool | None) -> None:
        if yes:
            self._quit_pending = True
            self._withdraw_confirmed = False
            self.action_withdraw()

    def _maybe_finish_quit(self) -> None:
        if self._quit_pending and self._withdraw_confirmed and self.busy is None:
            self._stop_poll.set()
            self.exit(0)

    # ---- viewing a session file ---------------------------------------------------------------------------
    def _show_session_file(self, path: Path) -> None:
        from assistant.tui.stored_view import show_stored

        try:
            shown = self._stored if self._stored is not None else load_session(path)
        except Exception as exc:
            self.say("error", f"cannot open {path}: {exc}")
            return
        show_stored(self, shown, path)
        self.show_field_series_file(path)


def safe_words(controller) -> str:
    """What a safe stop leaves, as the operator reads it (the field as well when there is a magnet)."""
    from drivers.base import Capability

    caps = getattr(controller, "capabilities", ())  # an attribute: no call, so no wait for the controller's lock
    return "tip withdrawn, drive off, bias 0 V" + (", field 0" if Capability.APPLIED_FIELD in caps else "")
