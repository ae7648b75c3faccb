"""Analysis view: mean phase against lift height with the fitted parts, magnetic RMS against height, the
recommended lift height and V_cpd, and where the report was written."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from textual.containers import Horizontal, Vertical
from rich.markup import escape
from textual.widgets import Button, Static
from textual_plotext import PlotextPlot

from assistant.formatting import number, quantity, span
from assistant.report.results import parts_together_deg, results_block
from assistant.tui.plots import DATA, FIT, PART_A, PART_B, redraw
from assistant.tui.view_base import View


def _arr(d: dict, key: str) -> np.ndarray | None:
    v = d.get(key)
    if v is None:
        return None
    a = np.asarray(v, dtype=float)
    return a if a.size else None


def _num(d: dict, key: str) -> float | None:
    v = d.get(key)
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


class AnalysisView(View):
    DEFAULT_CSS = """
    AnalysisView #an-side { width: 36; padding-right: 2; }  /* clear of the tick labels */
    AnalysisView #an-plots { width: 1fr; }
    AnalysisView PlotextPlot { height: 1fr; min-height: 5; }
    AnalysisView #an-text { height: 1fr; }
    """

    def __init__(self, **kw) -> None:
        super().__init__(**kw)
        self.result: dict | None = None
        self.mean_phase: np.ndarray | None = None
        self.report_dir: str | None = None
        self.field_map: dict | None = None
        self.biases_v: list[float] | None = None

    def compose(self):
        with Horizontal():
            with Vertical(id="an-side"):
                with Horizontal(classes="buttons"):
                    yield Button("Analyze", id="analyse", variant="primary")
                    yield Button("Report", id="report")
                    yield Button("Field map", id="fieldmap")
                yield Static("Run a series (4), then Analyze.", id="an-text")
            with Vertical(id="an-plots"):
                yield PlotextPlot(id="an-mean")
                yield PlotextPlot(id="an-rms")

    def on_button_pressed(self, event: Button.Pressed) -> None:
        if event.button.id == "analyse":
            event.stop()
            self.app.start_analysis()
        elif event.button.id == "report":
            event.stop()
            self.app.start_report()
        elif event.button.id == "fieldmap":
            event.stop()
            self.app.start_field_map()

    def show(self, result: dict, *, mean_phase_deg=None, biases_v=None) -> None:
        """``result``: ``SeriesAnalysis.to_dict()`` or a stored analysis record's scalars and arrays."""
        self.result = dict(result)
        self.biases_v = None if biases_v is None else [float(b) for b in biases_v]
        mp = _arr(self.result, "mean_phase_deg") if mean_phase_deg is None else np.asarray(mean_phase_deg, float)
        if mp is not None and mp.ndim == 2:  # bias grid: the bias-averaged mean against height
            mp = mp.mean(axis=1)
        self.mean_phase = mp
        self.query_one("#an-text", Static).update(self._text())
        self.mark_dirty()

    def set_report(self, out_dir: str) -> None:
        self.report_dir = out_dir
        if self.result is not None:
            self.query_one("#an-text", Static).update(self._text())
        else:
            self.query_one("#an-text", Static).update(f"report written to\n{out_dir}")

    def step_finished(self, step: str, result, error) -> None:
        if error is not None:
            return
        if step == "analyze":
            self.show(result.to_dict(), mean_phase_deg=getattr(result, "mean_phase_deg", None),
                      biases_v=getattr(result, "bias_v", None))
        elif step == "report":
            self.set_report(str(getattr(result, "out_dir", result)))
        elif step == "field map":
            self.field_map = getattr(result, "summary", None)
            self.query_one("#an-text", Static).update(self._text())

    def _text(self) -> str:
        d = self.result or {}
        names = {"Recommended lift height": "[b]lift[/b]", "Recommended tip bias": "[b]bias[/b]",
                 "Noise": "[b]noise[/b]", "Warnings": "[b]warnings[/b]"}
        lines = [f"{names.get(n, n)} {escape(t)}" for n, t in results_block(d)]
        lines.insert(2, f"[b]report[/b] {escape(Path(self.report_dir).name)}/ (next to the session file)"
                     if self.report_dir else
                     "[b]report[/b] not written yet (Report)")  # after lift and bias: visible at 80 x 24
        fm = self.field_map
        if fm:
            where = "stored as field_map/" if not fm.get("field_file") else "in the report folder"
            lines.insert(3, escape(f"field map: μ0 Hz rms {number(fm['mu0_hz_rms_mt'], digits=3)} mT at "
                                   f"{quantity(fm['height_nm'], 'nm', digits=3)} (periods "
                                   f"{span(*fm['band_nm'], 'nm')}; {where})"))
            lines += [escape(f"  warning: {w}") for w in fm.get("warnings", [])]
        return "\n".join(lines)

    def redraw(self) -> None:
        d = self.result
        if d is None:
            return
        h = _arr(d, "heights_nm")
        if h is None:
            return
        es, sr, mp = _arr(d, "electrostatic_mean_deg"), _arr(d, "short_range_mean_deg"), self.mean_phase
        if es is not None and es.ndim == 2:
            es = es.mean(axis=1)
        rms, rms_std = _arr(d, "magnetic_rms_deg"), _arr(d, "magnetic_rms_std_deg")

        def mean(plt):
            if mp is not None and mp.shape == h.shape:
                plt.scatter(h, mp, color=DATA, marker="o")
            if es is not None and es.shape == h.shape:
                plt.plot(h, es, color=PART_A)
            if sr is not None and sr.shape == h.shape:
                plt.plot(h, sr, color=PART_B)
            if es is not None and sr is not None and es.shape == sr.shape == h.shape:
                plt.plot(h, parts_together_deg(str(d.get("signal_space")), es, sr), color=FIT)
            # the key in the title, not a legend box over the data
            plt.title("image mean: o measured, fit = electrostatic + short-range")
            plt.xlabel("lift height (nm)")
            plt.ylabel("phase (°)")

        def rms_plot(plt):
            if rms is not None and rms.shape == h.shape:
                plt.plot(h, rms, color=PART_A, marker="o")
                if rms_std is not None and rms_std.shape == h.shape:
                    plt.plot(h, rms + rms_std, color=DATA)
                    plt.plot(h, np.maximum(rms - rms_std, 0), color=DATA)
            rec = _num(d, "recommended_lift_nm")
            if rec is not None:
                plt.vline(rec, color=FIT)
            plt.title("magnetic rms" + (f", recommended lift {quantity(rec, 'nm')} (red)" if rec else ""))
            plt.xlabel("lift height (nm)")
            plt.ylabel("rms (°)")

        redraw(self.query_one("#an-mean", PlotextPlot), mean)
        redraw(self.query_one("#an-rms", PlotextPlot), rms_plot)
