"""Approach view: coarse travel, the Z extension gauge, amplitude against the setpoint, start and stop."""

from __future__ import annotations

from textual.containers import Horizontal, Vertical
from textual.widgets import Button, ProgressBar, Sparkline, Static

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
            yield Static("Calibrate first (1): the approach uses its drive and setpoint.", id="ap-info")

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
        self.last = {"travel_m": event.done, "total_m": event.total or self.travel_max_m, **event.data}
        self.trace.append(float(event.data.get("amplitude_v", 0.0)))
        self.trace = self.trace[-200:]
        self.mark_dirty()

    def step_finished(self, step: str, result, error) -> None:
        if step == "calibrate" and error is None:
            self.setpoint_v, self.free_v = result.drive.setpoint_v, result.drive.free_amplitude_v
            self.query_one("#ap-info", Static).update(
                f"setpoint {self.setpoint_v * 1e3:.1f} mV of free {self.free_v * 1e3:.1f} mV. Start when ready.")
        elif step == "approach":
            if error is None:
                self.query_one("#ap-info", Static).update(
                    f"ENGAGED after {result.cycles} cycles: Z {result.z_m * 1e6:.2f} µm, coarse travel "
                    f"{result.coarse_travel_m * 1e6:.1f} µm")
            else:
                self.query_one("#ap-info", Static).update(f"approach stopped: {error}")

    def redraw(self) -> None:
        if self.last is None:
            return
        d = self.last
        self.query_one("#ap-travel", ProgressBar).update(
            progress=100 * max(0.0, d["travel_m"]) / max(d["total_m"], 1e-12))
        self.query_one("#ap-z", ProgressBar).update(progress=100 * d.get("z_m", 0.0) / self.z_range_m)
        if self.free_v:
            self.query_one("#ap-amp", ProgressBar).update(progress=min(100.0, 100 * d.get("amplitude_v", 0) / self.free_v))
        self.query_one("#ap-trace", Sparkline).data = list(self.trace)
        sp = f", setpoint {self.setpoint_v * 1e3:.1f} mV" if self.setpoint_v else ""
        self.query_one("#ap-info", Static).update(
            f"coarse {d.get('coarse_m', 0.0) * 1e6:.2f} µm (travel {d['travel_m'] * 1e6:.2f} of "
            f"{d['total_m'] * 1e6:.0f} µm), Z {d.get('z_m', 0.0) * 1e6:.3f} µm, "
            f"amplitude {d.get('amplitude_v', 0.0) * 1e3:.1f} mV{sp}")
