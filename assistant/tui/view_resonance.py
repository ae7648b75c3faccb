"""Resonance view: the drive sweep's amplitude and phase with the fitted oscillator, and the drive that
imaging will use (drive frequency, free amplitude, setpoint)."""

from __future__ import annotations

import numpy as np
from textual.containers import Horizontal, Vertical
from textual.widgets import Static
from textual_plotext import PlotextPlot

from assistant.tui.plots import DATA, FIT, decimate, redraw
from assistant.tui.view_base import View, fmt_unc
from assistant.tui.widgets import Field


class ResonanceView(View):
    EVENTS = ("drive sweep", "sweep fit")
    DEFAULT_CSS = """
    ResonanceView #res-plots { width: 1fr; }
    ResonanceView #res-side { width: 34; }
    ResonanceView PlotextPlot { height: 1fr; min-height: 5; }
    """

    def __init__(self, **kw) -> None:
        super().__init__(**kw)
        self.sweep: dict | None = None
        self.model: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    def compose(self):
        with Horizontal():
            with Vertical(id="res-plots"):
                yield PlotextPlot(id="sweep-amplitude")
                yield PlotextPlot(id="sweep-phase")
            with Vertical(id="res-side"):
                yield Static("Used by the next calibration:")
                yield Field("free ampl. nm", "20", id="res-free-nm")
                yield Field("setpoint ratio", "0.7", id="res-ratio")
                yield Static("", id="res-progress")
                yield Static("No sweep yet: Calibrate in the Probe view (1) runs it.", id="res-drive")

    def free_amplitude_m(self) -> float:
        return self.number("res-free-nm", "free amplitude") * 1e-9

    def setpoint_ratio(self) -> float:
        return self.number("res-ratio", "setpoint ratio")

    def progress(self, event) -> None:
        if event.what == "drive sweep":
            self.query_one("#res-progress", Static).update(f"sweep {event.done:g} / {event.total:g} points")
            return
        d = event.data
        self.sweep = {k: np.asarray(d[k]) for k in ("frequency_hz", "amplitude_v", "phase_deg")}
        self.sweep["f0_hz"], self.sweep["q"] = d.get("f0_hz"), d.get("q")
        self.mark_dirty()

    def step_finished(self, step: str, result, error) -> None:
        if step != "calibrate" or error is not None:
            return
        fit = result.sweep
        if self.sweep is not None and hasattr(fit, "model"):
            f = np.linspace(self.sweep["frequency_hz"].min(), self.sweep["frequency_hz"].max(), 300)
            amp, phase = fit.model(f)
            self.model = (f, np.asarray(amp), np.asarray(phase))
        self.show_drive(result.summary())
        self.mark_dirty()

    def show_drive(self, s: dict) -> None:
        g = s.get
        lines = [
            f"sweep f0  {fmt_unc(g('sweep_f0_hz'), g('sweep_f0_std_hz'), 'Hz', 7)}",
            f"sweep Q   {fmt_unc(g('sweep_q'), g('sweep_q_std'), '')}",
            f"drive     {g('drive_frequency_hz', float('nan')):.1f} Hz",
            f"          {1e3 * g('drive_amplitude_v', float('nan')):.3f} mV",
            f"free amp. {g('free_amplitude_nm', float('nan')):.1f} nm = {1e3 * g('free_amplitude_v', float('nan')):.1f} mV",
            f"setpoint  {1e3 * g('setpoint_v', float('nan')):.1f} mV",
            f"phase ref {g('phase_reference_deg', float('nan')):.2f}°",
        ]
        self.query_one("#res-drive", Static).update("\n".join(lines))

    def redraw(self) -> None:
        if self.sweep is None:
            return
        s, m = self.sweep, self.model

        def amplitude(plt):
            x, y = decimate(s["frequency_hz"], s["amplitude_v"] * 1e3)
            plt.scatter(x, y, color=DATA, marker="dot")
            if m is not None:
                plt.plot(m[0], m[1] * 1e3, color=FIT)
            plt.title(f"amplitude mV; f0 {s['f0_hz']:.6g} Hz, Q {s['q']:.3g}" if s.get("f0_hz") else "amplitude mV")

        def phase(plt):
            x, y = decimate(s["frequency_hz"], s["phase_deg"])
            plt.scatter(x, y, color=DATA, marker="dot")
            if m is not None:
                plt.plot(m[0], m[2], color=FIT)
            plt.title("phase deg")
            plt.xlabel("Hz")

        redraw(self.query_one("#sweep-amplitude", PlotextPlot), amplitude)
        redraw(self.query_one("#sweep-phase", PlotextPlot), phase)
