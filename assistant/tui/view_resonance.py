"""Resonance view: the drive sweep's amplitude and phase with the fitted oscillator, and the drive that
imaging will use (drive frequency, free amplitude, setpoint)."""

from __future__ import annotations

import numpy as np
from textual.containers import Horizontal, Vertical
from textual.widgets import Static
from textual_plotext import PlotextPlot

from assistant.formatting import number, progress_text, quantity
from assistant.tui.plots import DATA, FIT, decimate, redraw
from assistant.tui.view_base import View
from assistant.tui.widgets import Field


class ResonanceView(View):
    EVENTS = ("drive sweep", "sweep fit")
    DEFAULT_CSS = """
    ResonanceView #res-plots { width: 1fr; }
    ResonanceView #res-side { width: 36; padding-left: 2; }
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
            self.query_one("#res-progress", Static).update(
                progress_text("drive sweep", event.done, event.total, "points"))
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

    def show_stored_sweep(self, arrays: dict) -> None:
        """A stored drive sweep with the oscillator fitted to it again (``mfma tui --open``)."""
        from assistant.analysis.calibration import fit_drive_sweep

        f, a, p = (np.asarray(arrays[k], dtype=float) for k in ("frequency_hz", "amplitude_v", "phase_deg"))
        self.sweep = {"frequency_hz": f, "amplitude_v": a, "phase_deg": p, "f0_hz": None, "q": None}
        try:
            fit = fit_drive_sweep(f, a, p)
        except (ValueError, RuntimeError):
            self.mark_dirty()
            return
        self.sweep["f0_hz"], self.sweep["q"] = fit.f0_hz, fit.q
        fm = np.linspace(f.min(), f.max(), 300)
        amp, phase = fit.model(fm)
        self.model = (fm, np.asarray(amp), np.asarray(phase))
        self.mark_dirty()

    def show_drive(self, s: dict) -> None:
        g = s.get
        lines = [
            f"sweep f0  {quantity(g('sweep_f0_hz'), 'Hz', g('sweep_f0_std_hz'))}",
            f"sweep Q   {number(g('sweep_q'), g('sweep_q_std'))}",
            f"drive     {quantity(g('drive_frequency_hz'), 'Hz', digits=6)}",
            f"          {quantity(g('drive_amplitude_v'), 'V')}",
            f"free amplitude {quantity(g('free_amplitude_nm'), 'nm', digits=3)}",
            f"          = {quantity(g('free_amplitude_v'), 'V')} at the detector",
            f"setpoint  {quantity(g('setpoint_v'), 'V')}",
            f"phase reference {quantity(g('phase_reference_deg'), 'deg', digits=3)}",
        ]
        self.query_one("#res-drive", Static).update("\n".join(lines))

    def redraw(self) -> None:
        if self.sweep is None:
            return
        s, m = self.sweep, self.model

        def amplitude(plt):
            x, y = decimate(s["frequency_hz"] / 1e3, s["amplitude_v"] * 1e3)
            plt.scatter(x, y, color=DATA, marker="dot")
            if m is not None:
                plt.plot(m[0] / 1e3, m[1] * 1e3, color=FIT)
            plt.title(f"fit f0 {quantity(s['f0_hz'], 'Hz')}, Q {number(s['q'], digits=3)}" if s.get("f0_hz")
                      else "drive sweep")
            plt.ylabel("amplitude (mV)")

        def phase(plt):
            x, y = decimate(s["frequency_hz"] / 1e3, s["phase_deg"])
            plt.scatter(x, y, color=DATA, marker="dot")
            if m is not None:
                plt.plot(m[0] / 1e3, m[2], color=FIT)
            plt.ylabel("phase (°)")
            plt.xlabel("frequency (kHz)")

        redraw(self.query_one("#sweep-amplitude", PlotextPlot), amplitude)
        redraw(self.query_one("#sweep-phase", PlotextPlot), phase)
