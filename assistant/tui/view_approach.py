"""Approach view: coarse travel, the Z extension gauge, amplitude against the setpoint, start and stop.

Z has one source: the controller's status, which the header shows too (the approach's own events carry the Z of
each search, which the feedback changes once it has engaged).
"""

from __future__ import annotations

from textual.containers import Horizontal, Vertical
from textual.widgets import Button, ProgressBar, Sparkline, Static

from assistant.formatting import progress_text, quantity
from assistant.tui.view_base import View


class ApproachView(View):
    EVENTS = ("approach",)
    DEFAULT_CSS = """
    ApproachView .gauge { height: 1; }
    ApproachView .gauge > Static { width: 16; }
    ApproachView .gauge > ProgressBar { width: 1fr; }
    ApproachView Sparkline { height: 4; margin: 1 0; }
    ApproachView #ap-info { height: auto; }
    """

    def __init__(self, **kw) -> None:
        super().__init__(**kw)
        self.trace: list[float] = []
        self.last: dict | None = None
        self.travel_max_m = 300e-6
        self.z_range_m = 10e-6
        self.setpoint_v: float | None = None
        self.free_v: float | None = None
        self.z_m: float | None = None  # from the controller's status, as in the header
        self.result_text: str | None = None
        self.hint = "Calibrate first (1): the approach uses its drive and setpoint."

    def compose(self):
        with Vertical():
            with Horizontal(classes="buttons"):
                yield Button("Start approach", id="approach-start", variant="primary")
                yield Button("Stop", id="approach-stop", variant="error")
            with Horizontal(classes="gauge"):
                yield Static("coarse travel")
                yield ProgressBar(total=100, show_eta=False, id="ap-travel")
            with Horizontal(classes="gauge"):
                yield Static("Z extension")
                yield ProgressBar(total=100, show_eta=False, id="ap-z")
            with Horizontal(classes="gauge"):
                yield Static("amplitude/free")
                yield ProgressBar(total=100, show_eta=False, id="ap-amp")
            yield Sparkline([], id="ap-trace")
            yield Static(self.hint, id="ap-info")

    def show_status(self, status) -> None:
        """A status poll: the Z gauge and the Z in the text follow the same reading as the header."""
        if self.z_m != status.z_m:
            self.z_m = status.z_m
            self.mark_dirty()

    def show_stored(self, scalars: dict, arrays: dict) -> None:
        """A stored approach (``mfma tui --open``): where it engaged and its amplitude trace."""
        amp = arrays.get("trace_amplitude_v")
        if amp is not None:
            self.query_one("#ap-trace", Sparkline).data = [float(v) for v in amp]
        engaged = bool(scalars.get("engaged"))
        self.result_text = (f"{'ENGAGED' if engaged else 'not engaged'} after {scalars.get('cycles', '—')} cycles: "
                            f"Z {quantity(scalars.get('z_m'), 'm')}, coarse travel "
                            f"{quantity(scalars.get('coarse_travel_m'), 'm')} (stored)")
        self.query_one("#ap-info", Static).update(self.result_text)

    def configure(self, *, travel_max_m: float, z_range_m: float) -> None:
        self.travel_max_m, self.z_range_m = travel_max_m, z_range_m

    def on_button_pressed(self, event: Button.Pressed) -> None:
        if event.button.id == "approach-start":
            event.stop()
            self.app.start_approach()
        elif event.button.id == "approach-stop":
            event.stop()
            self.app.action_cancel()

    def progress(self, event) -> None:
        self.result_text = None
        self.last = {"travel_m": event.done, "total_m": event.total or self.travel_max_m, **event.data}
        self.trace.append(float(event.data.get("amplitude_v", 0.0)))
        self.trace = self.trace[-200:]
        self.mark_dirty()

    def step_finished(self, step: str, result, error) -> None:
        if step == "calibrate" and error is None:
            self.setpoint_v, self.free_v = result.drive.setpoint_v, result.drive.free_amplitude_v
            self.hint = (f"setpoint {quantity(self.setpoint_v, 'V')} of free {quantity(self.free_v, 'V')}. "
                         f"Start when ready.")
            self.mark_dirty()
        elif step == "approach":
            if error is None:
                self.result_text = (f"ENGAGED after {result.cycles} cycles: coarse travel "
                                    f"{quantity(result.coarse_travel_m, 'm')}")
                if self.last is not None:  # the gauge ends where the approach ended, not at its last search
                    self.last = {**self.last, "travel_m": result.coarse_travel_m}
            else:
                self.result_text = f"approach stopped: {error}"
            self.mark_dirty()

    def redraw(self) -> None:
        if self.z_m is not None:
            self.query_one("#ap-z", ProgressBar).update(progress=100 * self.z_m / self.z_range_m)
        z = f"Z {quantity(self.z_m, 'm')} of {quantity(self.z_range_m, 'm')}" if self.z_m is not None else ""
        if self.last is None:
            self.query_one("#ap-info", Static).update("\n".join(t for t in (self.result_text or self.hint, z) if t))
            return
        d = self.last
        self.query_one("#ap-travel", ProgressBar).update(
            progress=100 * max(0.0, d["travel_m"]) / max(d["total_m"], 1e-12))
        if self.free_v:
            self.query_one("#ap-amp", ProgressBar).update(progress=min(100.0, 100 * d.get("amplitude_v", 0) / self.free_v))
        self.query_one("#ap-trace", Sparkline).data = list(self.trace)
        sp = f" (setpoint {quantity(self.setpoint_v, 'V')})" if self.setpoint_v else ""
        if self.result_text:  # finished: what it ended with, and Z from the status as in the header
            lines = [self.result_text, z]
        else:
            lines = [progress_text("coarse travel", d["travel_m"], d["total_m"], "m") + f", {z}",
                     f"amplitude {quantity(d.get('amplitude_v'), 'V')}{sp}"]
        self.query_one("#ap-info", Static).update("\n".join(lines))
