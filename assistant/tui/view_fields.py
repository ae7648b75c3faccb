"""Field-series view: the settings (checked by the procedure's own rules and the magnet's limits), progress per
field step, the latest phase image, and the loop growing as the steps come in (the analysis of the steps so
far, in a thread, after every completed step)."""

from __future__ import annotations

import numpy as np
from textual.containers import Horizontal, Vertical, VerticalScroll
from textual.widgets import Button, Checkbox, ProgressBar, Static
from textual_plotext import PlotextPlot

from assistant.formatting import DASH, duration, number_list, quantity
from assistant.report.colours import symmetric_limit
from assistant.report.names import field_path
from assistant.tui.plots import DATA, FIT, PART_B, redraw
from assistant.tui.view_base import FieldError, View
from assistant.tui.widgets import Field, HalfBlockImage, ScaleKey


class FieldSeriesView(View):
    EVENTS = ("field series",)
    DEFAULT_CSS = """
    FieldSeriesView #fields-top { height: 1fr; }
    FieldSeriesView #fields-form { width: 36; }
    FieldSeriesView #fields-live { width: 1fr; }
    FieldSeriesView #fields-loop { height: 1fr; min-height: 6; }
    FieldSeriesView #fields-image { width: 24; height: 6; }
    FieldSeriesView #fields-bottom { height: 6; }
    FieldSeriesView #fields-result { width: 1fr; height: 6; }
    FieldSeriesView #fields-bar { height: 1; }
    FieldSeriesView #fields-message { height: auto; max-height: 8; }
    FieldSeriesView Checkbox { height: 1; border: none; padding: 0; }
    """

    def __init__(self, **kw) -> None:
        super().__init__(**kw)
        self.fields_a_per_m: tuple[float, ...] = ()
        self.phase: np.ndarray | None = None  # (steps, lines, pixels)
        self.topography: np.ndarray | None = None
        self.steps_done = 0
        self.current: tuple[int, int] | None = None  # (step, line) last received
        self.measured: dict[int, float] = {}
        self.loop: object | None = None  # the latest LoopAnalysis of the steps so far
        self.loop_error: str | None = None
        self.remaining_s: float | None = None
        self.ended: str | None = None  # how the last series ended, once it has

    def compose(self):
        with Horizontal(id="fields-top"):
            with VerticalScroll(id="fields-form"):  # a long check message scrolls in a short terminal
                yield Field("fields kA/m", "450:-450:50", id="f-fields", placeholder="list or START:STOP:STEP")
                yield Field("lift nm", "50", id="f-lift")
                yield Field("scan size µm", "3", id="f-size")
                yield Field("pixels", "48", id="f-pixels")
                yield Field("lines", "24", id="f-lines")
                yield Field("line rate Hz", "1", id="f-rate")
                yield Checkbox("repeat lift pass per line", True, id="f-repeat")
                with Horizontal(classes="buttons"):
                    yield Button("Check", id="fields-check")
                    yield Button("Start", id="fields-start", variant="primary")
                    yield Button("Analyze", id="fields-analyse")
                yield Static("", id="fields-message")
            with Vertical(id="fields-live"):
                yield ProgressBar(total=1, show_eta=False, id="fields-bar")
                yield Static("no field series running", id="fields-status")
                yield PlotextPlot(id="fields-loop")
        with Horizontal(id="fields-bottom"):
            yield HalfBlockImage(id="fields-image")
            yield Static("", id="fields-result")
        yield ScaleKey(id="fields-scale")

    # settings ----------------------------------------------------------------------------------------
    def settings(self):
        from assistant.procedures.field_series import FieldSeriesSettings, parse_fields_ka_per_m

        text = self.text("f-fields")
        if not text:
            raise FieldError("fields: a list or START:STOP:STEP in kA/m is needed")
        return FieldSeriesSettings(
            fields_a_per_m=tuple(f * 1e3 for f in parse_fields_ka_per_m(text)),
            lift_height_m=self.number("f-lift", "lift") * 1e-9,
            lines=int(self.number("f-lines", "lines", integer=True)),
            pixels=int(self.number("f-pixels", "pixels", integer=True)),
            scan_size_m=self.number("f-size", "scan size") * 1e-6,
            line_rate_hz=self.number("f-rate", "line rate"),
            repeat_first=self.query_one("#f-repeat", Checkbox).value)

    def on_button_pressed(self, event: Button.Pressed) -> None:
        if event.button.id not in ("fields-check", "fields-start", "fields-analyse"):
            return
        event.stop()
        msg = self.query_one("#fields-message", Static)
        if event.button.id == "fields-analyse":
            self.app.start_loop_analysis()
            return
        try:
            s = self.settings()
            self.app.check_field_series(s)
        except ValueError as exc:  # FieldError and FieldSeriesSettingsError both are ValueErrors
            msg.update(f"[b]not valid:[/b] {exc}")
            return
        msg.update(f"ok: fields {field_path(s.fields_a_per_m)}; {s.order}")
        if event.button.id == "fields-start":
            self.app.start_field_series(s)

    # data ----------------------------------------------------------------------------------------------
    def begin(self, *, fields_a_per_m, lines: int, pixels: int) -> None:
        self.fields_a_per_m = tuple(float(h) for h in fields_a_per_m)
        self.phase = np.full((len(self.fields_a_per_m), lines, pixels), np.nan)
        self.topography = np.full_like(self.phase, np.nan)
        self.steps_done, self.current, self.measured = 0, None, {}
        self.loop, self.loop_error, self.ended = None, None, None
        self.query_one("#fields-bar", ProgressBar).update(total=len(self.fields_a_per_m) * lines, progress=0)
        self.mark_dirty()

    def load(self, data, analysis=None) -> None:
        """Show a stored field series (``SessionFile.read_field_series``) and its analysis if given."""
        self.begin(fields_a_per_m=data.field_a_per_m, lines=data.lines, pixels=data.pixels)
        k = data.completed_steps
        self.phase[:k], self.topography[:k] = data.phase_deg, data.topography_m
        self.steps_done = k
        self.current = (k - 1, data.lines - 1) if k else None
        self.loop = analysis
        self.mark_dirty()

    def progress(self, event) -> None:
        d = event.data
        if self.phase is None or tuple(d.get("fields_a_per_m", ())) != self.fields_a_per_m:
            self.begin(fields_a_per_m=d["fields_a_per_m"], lines=d["lines"], pixels=d["pixels"])
        step, row = int(d["step"]), int(d["row"])
        self.phase[step, row] = np.asarray(d["phase_deg"], dtype=float)
        self.topography[step, row] = np.asarray(d["topography_m"], dtype=float)
        self.measured[step] = float(d["measured_field_a_per_m"])
        self.current = (step, row)
        self.remaining_s = event.remaining_s
        if d.get("step_complete"):
            self.steps_done = step + 1
            self._preview_loop()
        self.mark_dirty()

    def _preview_loop(self) -> None:
        if self.steps_done < 3:
            return
        k = self.steps_done
        phase, topo, fields = self.phase[:k].copy(), self.topography[:k].copy(), np.asarray(self.fields_a_per_m[:k])
        self.run_worker(lambda: self._analyse(phase, topo, fields), thread=True, group="loop-preview",
                        exclusive=True, exit_on_error=False)

    def _analyse(self, phase, topo, fields) -> None:
        from assistant.analysis.field_series import LoopInputError, analyse_loop

        try:
            result, error = analyse_loop(phase, fields, topography_m=topo), None
        except LoopInputError as exc:
            result, error = None, str(exc)
        self.app.call_from_thread(self._loop_ready, result, error)

    def _loop_ready(self, result, error) -> None:
        if result is not None:
            self.loop, self.loop_error = result, None
        else:
            self.loop_error = error
        self.mark_dirty()

    def step_finished(self, step: str, result, error) -> None:
        if step == "field series":
            if error is None:
                self.ended = (f"field series {result.name} done: {result.completed_steps} field steps; the field "
                              f"is back at 0")
            else:
                self.ended = f"field series stopped after {self.steps_done} steps: {error}"
            self.mark_dirty()
        elif step == "analyse loop" and error is None:
            self.loop, self.loop_error = result, None
            self.mark_dirty()

    # drawing -------------------------------------------------------------------------------------------
    def redraw(self) -> None:
        if self.phase is None:
            return
        steps, lines = self.phase.shape[:2]
        bar = self.query_one("#fields-bar", ProgressBar)
        if self.current is not None:
            step, row = self.current
            bar.update(total=steps * lines, progress=step * lines + row + 1)
            h = quantity(self.fields_a_per_m[step], "A/m")
            meas = self.measured.get(step)
            read = f" (reads {quantity(meas, 'A/m')})" if meas is not None else ""
            rem = f", about {duration(self.remaining_s)} left" if self.remaining_s is not None else ""
            self.query_one("#fields-status", Static).update(
                self.ended or f"step {step + 1} of {steps} at {h}{read}, line {row + 1} of {lines}{rem}")
            image = self.phase[step] - np.nanmean(self.phase[step]) if np.isfinite(self.phase[step]).any() else None
            limit = symmetric_limit(image) if image is not None else 1.0
            self.query_one("#fields-image", HalfBlockImage).set_image(image, limit)
            self.query_one("#fields-scale", ScaleKey).set_limit(limit)
        self._draw_loop()
        self._show_result()

    def _draw_loop(self) -> None:
        a = self.loop
        plot = self.query_one("#fields-loop", PlotextPlot)

        def draw(plt):
            plt.title("M/Ms of the elements against the field (kA/m)")
            if a is None:
                return
            from assistant.analysis.field_series import branches

            h, m = a.field_a_per_m / 1e3, a.m_over_ms
            for b in branches(a.field_a_per_m):
                seg = slice(b.start, b.end + 1)
                plt.plot(h[seg].tolist(), np.nan_to_num(m[seg]).tolist(), marker="dot",
                         color=DATA if b.direction < 0 else PART_B)
            for field in a.tip_reversal_fields_a_per_m:
                plt.vline(field / 1e3, FIT)
            plt.ylim(-1.1, 1.1)

        redraw(plot, draw)

    def _show_result(self) -> None:
        a = self.loop
        box = self.query_one("#fields-result", Static)
        if a is None:
            box.update(self.loop_error or ("the loop appears after 3 field steps" if self.steps_done < 3 else ""))
            return
        hc, sig = a.coercive_a_per_m, a.sfd_sigma_a_per_m
        rev = number_list(a.tip_reversal_fields_a_per_m, "A/m") if a.tip_reversal_fields_a_per_m else "none"
        lines = [f"{a.count} elements ({a.elements.source}), {a.field_a_per_m.size} steps",
                 "Hc " + (quantity(hc, "A/m", a.coercive_std_a_per_m) if np.isfinite(hc) else DASH)
                 + ", σ " + (quantity(sig, "A/m", a.sfd_sigma_std_a_per_m) if np.isfinite(sig) else DASH),
                 f"tip reversed at: {rev}",
                 "switched by the tip: " + (", ".join(map(str, a.tip_switched_elements)) or "none")]
        box.update("\n".join(lines))
