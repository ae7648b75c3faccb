"""Opening the controller after the first screen: the app draws at once and connects in a thread.

Opening the simulated stage imports its physics (scipy's interpolation, special functions, FFTs) and a real
controller may take a while to answer; neither needs to hold back the screen. ``mfma tui`` therefore gives the
app a ``connect`` function instead of an open controller. After the first refresh a thread calls it (and imports
the workflow), then hands the controller to the UI thread, which builds the workflow, configures the views and
starts the status poll. Until then the status line says "connecting"; a withdraw asked for in that time is
carried out as soon as the controller is there; quitting is allowed (nothing has been commanded yet) and
``mfma tui`` still makes the stage safe and closes the controller once the thread has ended. If opening fails,
the app exits and the error is raised again by :meth:`DeferredConnection.connection_result`.
"""

from __future__ import annotations

import threading

from assistant.tui.bridge import MessageSink, SerialisedController


class DeferredConnection:
    """Mixin of :class:`assistant.tui.app.MfmApp` for a controller opened after the first screen."""

    _connect = None  # () -> an open controller; None when the app was given one (or views a file)
    _connected = None  # the controller the thread opened (unwrapped), for mfma tui to make safe and close
    _connect_error: BaseException | None = None
    _withdraw_on_connect = False

    def attach_controller(self, controller, *, scenario_text: str | None = None) -> None:
        """The controller (shared through :class:`SerialisedController`) and the workflow over it."""
        from assistant.procedures.workflow import Workflow

        self.controller = SerialisedController(controller)
        self.workflow = Workflow(self.controller, self.session_path, controller_url=self.controller_url,
                                 scenario_text=scenario_text, limits=self.limits, sink=MessageSink(self))

    def controller_live(self) -> None:
        """Once mounted with a controller: the approach view learns its limits and the status poll starts."""
        self.view("approach").configure(travel_max_m=self.limits.coarse_travel_max_m,
                                        z_range_m=self.controller.limits.z_range_m)
        self._poll_worker()

    @property
    def connecting(self) -> bool:
        return self._connect is not None and self.controller is None and self._connect_error is None

    def start_connecting(self) -> None:
        self._connect_done = threading.Event()
        self.call_after_refresh(lambda: threading.Thread(target=self._connect_in_thread, name="mfma-connect",
                                                         daemon=True).start())

    def _connect_in_thread(self) -> None:
        try:
            ctl = self._connect()
            self._connected = ctl
            import assistant.procedures.workflow  # noqa: F401  (loaded here, not on the UI thread)
        except BaseException as exc:  # reported by connection_result; the UI only shows that it failed
            self._connect_error = exc
            self._connect_done.set()
            self._from_thread(self._connect_failed)
            return
        self._connect_done.set()
        self._from_thread(self._connected_now, ctl)

    def _from_thread(self, fn, *args) -> None:
        try:
            self.call_from_thread(fn, *args)
        except RuntimeError:  # the app has already exited: mfma tui takes care of the controller
            pass

    def _connected_now(self, ctl) -> None:
        if not self.is_running:
            return
        self.attach_controller(ctl, scenario_text=getattr(ctl, "scenario_text", None))
        self.controller_live()
        self._update_status_line()
        if self._withdraw_on_connect:
            self.action_withdraw()

    def _connect_failed(self) -> None:
        self.exit(1)

    def connection_result(self, timeout_s: float | None = None):
        """After the app has run: the controller the thread opened (None if it never ran); re-raises its error."""
        if self._connect is None:
            return None
        done = getattr(self, "_connect_done", None)
        if done is not None and not done.wait(timeout_s):
            raise TimeoutError("the controller did not open in time")
        if self._connect_error is not None:
            raise self._connect_error
        return self._connected
