"""Probe view: the thermal spectrum averaging live with its fit, the Sader inputs, and the calibration result
with its uncertainties and the path that produced each number."""

from __future__ import annotations

import numpy as np
from textual.containers import Horizontal, Vertical
from textual.widgets import Button, Static
from textual_plotext import PlotextPlot

from assistant.formatting import number, progress_text, quantity
from assistant.tui.plots import DATA, FIT, decimate_log, log_ticks, redraw, to_log
from assistant.tui.view_base import FieldError, View
from assistant.tui.widgets import Field


def summary_lines(s: dict) -> list[str]:
    """Readable lines from ``CalibrationResult.summary()`` (or a stored calibration record's scalars)."""
    g = s.get
    lines = [
        f"spring constant k  {quantity(g('k_n_per_m'), 'N/m', g('k_std_n_per_m'))}",
        f"  from {g('k_source', '—')}",
        "optical-lever sensitivity (InvOLS)",
        f"  {quantity(g('invols_nm_per_v'), 'nm/V', g('invols_std_nm_per_v'))}, from {g('invols_source', '—')}",
        f"resonance f0  {quantity(g('f0_hz'), 'Hz', g('f0_std_hz'))} (thermal)",
        f"Q  {number(g('q'), g('q_std'))} (thermal), {number(g('sweep_q'), g('sweep_q_std'))} (sweep)",
    ]
    if g("thermal_check_k_n_per_m") is not None:
        agree = "agrees" if g("thermal_check_agree") else "DISAGREES"
        lines.append(f"check: thermal k {quantity(g('thermal_check_k_n_per_m'), 'N/m', g('thermal_check_k_std_n_per_m'))}"
                     f" {agree} ({number(g('thermal_check_difference_sigma'), digits=2)} σ)")
    return lines


class ProbeView(View):
    EVENTS = ("thermal record", "thermal spectrum", "thermal fit")
    DEFAULT_CSS = """
    ProbeView #probe-left { width: 36; padding-right: 2; }  /* clear of the tick labels */
    ProbeView #probe-right { width: 1fr; }
    ProbeView #thermal-plot { height: 1fr; min-height: 6; }
    ProbeView #probe-result { height: auto; max-height: 12; }
    ProbeView #probe-progress { height: 1; }
    """

    def __init__(self, **kw) -> None:
        super().__init__(**kw)
        self.spectrum: tuple[np.ndarray, np.ndarray] | None = None
        self.fit: dict | None = None
        self.segments = 0
        self.summary: dict | None = None
        self.accepted = False

    def compose(self):
        with Horizontal():
            with Vertical(id="probe-left"):
                yield Field("probe name", id="probe-name", placeholder="e.g. lever-A3")
                yield Field("length µm", id="probe-length", placeholder="plan view, Sader")
                yield Field("width µm", id="probe-width", placeholder="plan view, Sader")
                yield Field("temperature K", id="probe-temperature", placeholder="from sensor")
                yield Field("thermal s", "2", id="probe-seconds")
                with Horizontal(classes="buttons"):
                    yield Button("Calibrate", id="calibrate", variant="primary")
                    yield Button("Accept", id="accept", disabled=True)
                yield Static("", id="probe-progress")
                yield Static("Enter the lever's plan view for the Sader method, then Calibrate.",
                             id="probe-hint")
            with Vertical(id="probe-right"):
                yield PlotextPlot(id="thermal-plot")
                yield Static("", id="probe-result")

    # intents -----------------------------------------------------------------------------------------
    def calibration_settings(self, *, free_amplitude_m: float, setpoint_ratio: float):
        from assistant.procedures.calibrate import CalibrationSettings

        length = self.number("probe-length", "length", optional=True)
        width = self.number("probe-width", "width", optional=True)
        return CalibrationSettings(
            probe_name=self.text("probe-name") or None,
            length_m=length * 1e-6 if length else None, width_m=width * 1e-6 if width else None,
            temperature_k=self.number("probe-temperature", "temperature", optional=True),
            thermal_seconds=self.number("probe-seconds", "thermal record length"),
            free_amplitude_m=free_amplitude_m, setpoint_ratio=setpoint_ratio)

    def on_button_pressed(self, event: Button.Pressed) -> None:
        if event.button.id == "calibrate":
            event.stop()
            try:
                self.app.start_calibration()
            except FieldError as exc:
                self.app.say("error", str(exc))
        elif event.button.id == "accept":
            event.stop()
            self.app.accept_calibration()

    def ask_for_name(self) -> None:
        """Accept was pressed without a probe name: ask for one where it is typed, and wait for it."""
        self.query_one("#probe-hint", Static).update(
            "[b]Name the probe[/b] in the field above (e.g. lever-A3), then press Accept again. The calibration "
            "is kept; there is no need to calibrate again.")
        self.app.say("warning", "accept: the probe needs a name; type it in the probe name field")
        self.query_one("#probe-name").focus()

    def set_accepted(self, text: str) -> None:
        self.accepted = True
        self.query_one("#accept", Button).disabled = True
        self.query_one("#probe-hint", Static).update(text)

    # events ------------------------------------------------------------------------------------------
    def progress(self, event) -> None:
        if event.what == "thermal record":
            self.query_one("#probe-progress", Static).update(
                progress_text("thermal record", event.done, event.total, "s"))
            return
        d = event.data
        if "frequency_hz" in d and "psd_v2_per_hz" in d:
            self.spectrum = (np.asarray(d["frequency_hz"]), np.asarray(d["psd_v2_per_hz"]))
        if event.what == "thermal spectrum":
            self.segments = int(d.get("segments", 0))
            self.fit = None
        elif event.what == "thermal fit":
            self.fit = {"frequency_hz": np.asarray(d["frequency_hz"]), "model": np.asarray(d["model_v2_per_hz"]),
                        "f0_hz": d.get("f0_hz"), "q": d.get("q")}
        self.mark_dirty()

    def step_finished(self, step: str, result, error) -> None:
        if step != "calibrate" or error is not None:
            return
        self.show_summary(result.summary(), live=True)

    def show_summary(self, summary: dict, *, live: bool) -> None:
        self.summary = summary
        self.query_one("#probe-result", Static).update("\n".join(summary_lines(summary)))
        self.query_one("#accept", Button).disabled = not live
        if live:
            self.accepted = False
            self.query_one("#probe-hint", Static).update("Accept stores this calibration in the probe record.")

    def redraw(self) -> None:
        if self.spectrum is None:
            return
        f, p = self.spectrum
        fit = self.fit

        def draw(plt):
            x, y = decimate_log(f, p)
            lx, ly = to_log(x), to_log(y)
            plt.plot(lx, ly, color=DATA)
            if fit is not None:  # the key is in the title: a legend box would sit on the data
                xm, ym = decimate_log(fit["frequency_hz"], fit["model"])
                plt.plot(to_log(xm), to_log(ym), color=FIT)
                plt.title(f"fit (red): f0 {quantity(fit['f0_hz'], 'Hz')}, Q {number(fit['q'], digits=3)}")
                ly = np.concatenate([ly, to_log(ym)])
            else:
                plt.title(f"thermal PSD, {self.segments} averages")
            if lx.size:
                plt.xticks(*log_ticks(lx.min(), lx.max()))
                plt.yticks(*log_ticks(ly.min(), ly.max()))
            plt.xlabel("frequency (Hz)")
            plt.ylabel("PSD (V²/Hz)")

        redraw(self.query_one("#thermal-plot", PlotextPlot), draw)
