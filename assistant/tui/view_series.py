"""Series view: the lift-height series settings (validated by the procedure's own rules), progress with time
remaining, the latest phase line, and one preview per height on one shared scale centred on zero."""

from __future__ import annotations

import time

import numpy as np
from textual import on
from textual.containers import Horizontal, Vertical, VerticalScroll
from textual.widgets import Button, Checkbox, Input, Label, ProgressBar, Static
from textual_plotext import PlotextPlot

from assistant.formatting import duration, number_list
from assistant.tui.colours import symmetric_limit
from assistant.tui.plots import redraw
from assistant.tui.view_base import View
from assistant.tui.widgets import Field, HalfBlockImage, ScaleKey

LINE_PLOT_INTERVAL_S = 1.0
_LINE_COLOURS = ("blue", "cyan", "green", "orange", "red", "magenta", "yellow")


class Preview(Vertical):
    """One height's image with its lift height above it; previews share the width and grow with the terminal."""

    DEFAULT_CSS = """
    Preview { width: 1fr; min-width: 8; max-width: 48; height: 1fr; margin: 0 1 0 0; }
    Preview > Label { height: 1; width: 1fr; }
    Preview > HalfBlockImage { width: 1fr; height: 1fr; }
    """

    def __init__(self, title: str, index: int) -> None:
        super().__init__(id=f"preview-{index}")
        self.title = title

    def compose(self):
        yield Label(self.title)
        yield HalfBlockImage()


class SeriesView(View):
    EVENTS = ("series",)
    DEFAULT_CSS = """
    SeriesView #series-top { height: 3fr; min-height: 12; }
    SeriesView #series-form { width: 36; }
    SeriesView #series-live { width: 1fr; }
    SeriesView #series-line { height: 1fr; min-height: 4; }
    SeriesView #series-previews { height: 2fr; min-height: 5; }
    SeriesView #s-heights-echo { height: auto; color: $text-muted; }
    SeriesView #series-bar { height: 1; }
    SeriesView #series-message { height: auto; max-height: 8; }
    SeriesView Checkbox { height: 1; border: none; padding: 0; }
    """

    def __init__(self, **kw) -> None:
        super().__init__(**kw)
        self.heights_m: tuple[float, ...] = ()
        self.biases_v: tuple[float, ...] | None = None
        self.phase: np.ndarray | None = None  # (heights, lines, pixels), the first bias of a bias grid
        self.lines_done = 0
        self._line_drawn_at = -1e9  # monotonic time the latest-line plot was last drawn
        self.latest_row: int | None = None
        self.remaining_s: float | None = None
        self.instrument_s: float | None = None
        self._previews_built_for: tuple | None = None
        self.plan_sentence = ""
        self.final_message: str | None = None  # how the last series ended; progress never overwrites it

    def compose(self):
        with Horizontal(id="series-top"):
            form = VerticalScroll(id="series-form")
            form.can_focus = False  # tab goes straight to the fields; the wheel still scrolls it
            with form:
                yield Field("lift heights (nm), comma-separated", "10,15,20,30,50,75,100", id="s-heights",
                            stacked=True)
                yield Static(self._heights_echo("10,15,20,30,50,75,100"), id="s-heights-echo")
                yield Field("biases V", "", id="s-biases", placeholder="none, or >= 3")
                yield Field("scan size µm", "4", id="s-size")
                yield Field("pixels", "128", id="s-pixels")
                yield Field("lines", "32", id="s-lines")
                yield Field("line rate Hz", "1", id="s-rate")
                yield Checkbox("repeat 1st height per line", True, id="s-repeat")
                with Horizontal(classes="buttons"):
                    yield Button("Check", id="series-check")
                    yield Button("Start", id="series-start", variant="primary")
                yield Static("", id="series-message")
            with Vertical(id="series-live"):
                yield ProgressBar(total=1, show_eta=False, id="series-bar")
                yield Static("no series running", id="series-status")
                yield PlotextPlot(id="series-line")
        yield Horizontal(id="series-previews")
        yield ScaleKey(id="series-scale")

    @staticmethod
    def _heights_echo(text: str) -> str:
        """The whole list read back, so a field scrolled to its end never looks like a 5 nm lift."""
        try:
            values = [float(t) for t in text.replace(";", ",").split(",") if t.strip()]
        except ValueError:
            return "not a list of numbers"
        if not values:
            return "no heights"
        return f"{len(values)} height{'s' if len(values) > 1 else ''}: {number_list(values, 'nm')}"

    @on(Input.Changed, "#s-heights")
    def _heights_changed(self, event: Input.Changed) -> None:
        self.query_one("#s-heights-echo", Static).update(self._heights_echo(event.value))

    def show_message(self, text: str) -> None:
        self.query_one("#series-message", Static).update(text)

    # settings ----------------------------------------------------------------------------------------
    def settings(self):
        from assistant.procedures.preflight import free_series_name
        from assistant.procedures.series import SeriesSettings

        heights = self.numbers("s-heights", "heights")
        biases = self.numbers("s-biases", "biases", optional=True)
        return SeriesSettings(
            name=free_series_name(self.app.series_names()),  # series1, then series2, ... in one session file
            heights_m=tuple(h * 1e-9 for h in heights), biases_v=biases,
            lines=int(self.number("s-lines", "lines", integer=True)),
            pixels=int(self.number("s-pixels", "pixels", integer=True)),
            scan_size_m=self.number("s-size", "scan size") * 1e-6,
            line_rate_hz=self.number("s-rate", "line rate"),
            repeat_first=self.query_one("#s-repeat", Checkbox).value)

    def checked_settings(self):
        """Settings from the form, validated as the procedure will validate them; raises with the reason."""
        s = self.settings()
        self.plan_sentence = self.app.validate_series(s).sentence
        return s

    def on_button_pressed(self, event: Button.Pressed) -> None:
        if event.button.id not in ("series-check", "series-start"):
            return
        event.stop()
        msg = self.query_one("#series-message", Static)
        try:
            s = self.checked_settings()
        except ValueError as exc:  # FieldError and SeriesSettingsError both are ValueErrors
            msg.update(f"[b]not valid:[/b] {exc}")
            return
        msg.update(f"ok: {len(s.passes)} second passes per line. {self.plan_sentence}")
        if event.button.id == "series-start":
            self.app.start_series(s)

    # data ----------------------------------------------------------------------------------------------
    scan_size_m = 4e-6

    def begin(self, *, heights_m, biases_v, lines: int, pixels: int, scan_size_m: float | None = None) -> None:
        if scan_size_m:
            self.scan_size_m = float(scan_size_m)
        self.heights_m = tuple(float(h) for h in heights_m)
        self.biases_v = None if biases_v is None else tuple(float(b) for b in biases_v)
        self.phase = np.full((len(self.heights_m), lines, pixels), np.nan)
        self.lines_done, self.latest_row = 0, None
        self.remaining_s = self.instrument_s = None
        self.final_message = None
        self._build_previews()
        bar = self.query_one("#series-bar", ProgressBar)
        bar.update(total=lines, progress=0)
        self.mark_dirty()

    def load(self, data) -> None:
        """Show a stored series (``SessionFile.read_series``)."""
        phase = np.asarray(data.phase_deg, dtype=float)
        if data.biases_v is not None and phase.ndim == 4:
            phase = phase[:, 0]
        self.begin(heights_m=data.heights_m, biases_v=data.biases_v, lines=data.lines, pixels=data.pixels,
                   scan_size_m=data.scan_size_m)
        self.phase[:, : phase.shape[1]] = phase
        self.lines_done = data.completed_lines
        self.latest_row = data.completed_lines - 1 if data.completed_lines else None
        self.query_one("#series-bar", ProgressBar).update(progress=data.completed_lines)
        self.mark_dirty()

    def progress(self, event) -> None:
        d = event.data
        if self.phase is None or len(d.get("heights_m", ())) != self.phase.shape[0]:
            return
        row = int(d["row"])
        phase = np.asarray(d["phase_deg"], dtype=float)
        if phase.ndim == 3:  # (heights, biases, pixels): preview the first bias
            phase = phase[:, 0, :]
        self.phase[:, row, :] = phase
        self.lines_done = int(event.done)
        self.latest_row = row
        self.remaining_s = event.remaining_s
        self.instrument_s = d.get("instrument_remaining_s")
        self.mark_dirty()

    def step_finished(self, step: str, result, error) -> None:
        if step != "series":
            return
        if error is None:
            self.final_message = (f"{result.name} done: {result.completed_lines} of {result.lines} lines in "
                                  f"{duration(result.elapsed_s)}")
        else:
            self.final_message = f"[b]series stopped after {self.lines_done} lines:[/b] {error}"
        self.query_one("#series-status", Static).update(self.final_message)
        self.mark_dirty()

    def _build_previews(self) -> None:
        key = (self.heights_m, self.biases_v)
        if key == self._previews_built_for:
            return
        self._previews_built_for = key
        self.run_worker(self._rebuild_previews(key), group="previews", exclusive=True)

    async def _rebuild_previews(self, key) -> None:
        # Removing and mounting must be awaited in turn: left pending together they can stall the app's queue.
        box = self.query_one("#series-previews", Horizontal)
        await box.remove_children()
        await box.mount_all([Preview(f"{h * 1e9:g} nm", i) for i, h in enumerate(key[0])])
        self.query_one("#series-previews").styles.overflow_x = "auto"
        self.mark_dirty()

    def redraw(self) -> None:
        if self.phase is None:
            return
        lines = self.phase.shape[1]
        limit = symmetric_limit(self.phase)
        for i, preview in enumerate(self.query(Preview)):
            image, label = preview.query(HalfBlockImage), preview.query(Label)
            if not (image and label):
                # a preview half removed or half mounted while the previews are rebuilt: draw on the next tick
                self.mark_dirty()
                continue
            if i < self.phase.shape[0]:
                image.first().set_image(self.phase[i], limit)
                label.first().update(f"{self.heights_m[i] * 1e9:g} nm")
        self.query_one("#series-scale", ScaleKey).set_limit(limit)
        self.query_one("#series-bar", ProgressBar).update(total=lines, progress=self.lines_done)
        rem = f", about {duration(self.remaining_s)} left" if self.remaining_s is not None else ""
        inst = f" (instrument time {duration(self.instrument_s)})" if self.instrument_s is not None else ""
        bias = f"; previews at bias {self.biases_v[0]:g} V" if self.biases_v else ""
        live = f"line {self.lines_done} of {lines} at every height{rem}{inst}{bias}"
        self.query_one("#series-status", Static).update(self.final_message or live)
        if self.latest_row is None:
            return
        # plotext builds its whole canvas in Python on the UI thread: draw the latest line at most once a second
        # (and at the end), so the UI never stalls behind it while the series streams in
        now = time.monotonic()
        if now - self._line_drawn_at < LINE_PLOT_INTERVAL_S and self.lines_done < lines:
            self.mark_dirty()
            return
        self._line_drawn_at = now
        row, heights = self.latest_row, self.heights_m
        phase = self.phase[:, row, :]

        size_um = self.scan_size_m * 1e6

        def draw(plt):
            x = (np.arange(phase.shape[1]) + 0.5) * size_um / phase.shape[1]
            for i in range(phase.shape[0]):
                plt.plot(x, phase[i], color=_LINE_COLOURS[i % len(_LINE_COLOURS)])
            plt.title(f"line {row + 1}, every height (lowest: blue)")
            plt.xlabel("x (µm)")
            plt.ylabel("phase (°)")

        redraw(self.query_one("#series-line", PlotextPlot), draw)
