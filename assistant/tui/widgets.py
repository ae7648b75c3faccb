"""Small widgets shared by the views: half-block image previews, their colour key, and a compact field."""

from __future__ import annotations

import numpy as np
from rich.color import Color
from rich.segment import Segment
from rich.style import Style
from textual.containers import Horizontal
from textual.strip import Strip
from textual.widget import Widget
from textual.widgets import Input, Label

from assistant.tui.colours import LEVELS, diverging_scale, quantise_symmetric

_UPPER, _LOWER = "\u2580", "\u2584"  # upper and lower half blocks


class _StyleCache:
    """Rich styles for (top, bottom) colour index pairs, made once and reused (rendering stays cheap)."""

    def __init__(self, rgb: np.ndarray) -> None:
        self._colours = [Color.from_rgb(*map(int, c)) for c in rgb]
        self._cache: dict[tuple[int, int], tuple[str, Style]] = {}

    def cell(self, top: int, bottom: int) -> tuple[str, Style]:
        key = (top, bottom)
        hit = self._cache.get(key)
        if hit is None:
            if top < 0 and bottom < 0:
                hit = (" ", Style())
            elif bottom < 0:
                hit = (_UPPER, Style(color=self._colours[top]))
            elif top < 0:
                hit = (_LOWER, Style(color=self._colours[bottom]))
            else:
                hit = (_UPPER, Style(color=self._colours[top], bgcolor=self._colours[bottom]))
            self._cache[key] = hit
        return hit


DIVERGING = _StyleCache(diverging_scale(LEVELS))


def resample_nearest(image: np.ndarray, rows: int, cols: int) -> np.ndarray:
    """Nearest-neighbour resampling of a 2-D array to (rows, cols), vectorised."""
    image = np.asarray(image, dtype=float)
    r = np.minimum((np.arange(rows) + 0.5) * image.shape[0] / rows, image.shape[0] - 1).astype(int)
    c = np.minimum((np.arange(cols) + 0.5) * image.shape[1] / cols, image.shape[1] - 1).astype(int)
    return image[np.ix_(r, c)]


class HalfBlockImage(Widget):
    """A 2-D array drawn as coloured half-block cells: two image rows per terminal row.

    NaN pixels (lines not yet scanned) stay empty. ``limit`` is the symmetric scale limit shared with the
    other previews: the colour of a value means the same in all of them.
    """

    DEFAULT_CSS = "HalfBlockImage { width: 16; height: 8; }"

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self._img: np.ndarray | None = None
        self._img_limit = 1.0
        self._img_index: np.ndarray | None = None
        self._drawn_size: tuple[int, int] | None = None

    def set_image(self, image: np.ndarray | None, limit: float) -> None:
        self._img = None if image is None else np.asarray(image, dtype=float)
        self._img_limit = float(limit)
        self._img_index = None
        self.refresh()

    def _indices(self) -> np.ndarray | None:
        w, h = self.size.width, self.size.height
        if self._img is None or self._img.ndim != 2 or w <= 0 or h <= 0 or self._img.size == 0:
            return None
        if self._img_index is None or self._drawn_size != (w, h):
            self._img_index = quantise_symmetric(resample_nearest(self._img, 2 * h, w), self._img_limit)
            self._drawn_size = (w, h)
        return self._img_index

    def render_line(self, y: int) -> Strip:
        idx = self._indices()
        width = self.size.width
        if idx is None or 2 * y + 1 >= idx.shape[0]:
            return Strip.blank(width)
        top, bottom = idx[2 * y], idx[2 * y + 1]
        segments = []
        run_text, run_style = "", None
        for t, b in zip(top.tolist(), bottom.tolist()):
            ch, st = DIVERGING.cell(t, b)
            if st is run_style:
                run_text += ch
            else:
                if run_text:
                    segments.append(Segment(run_text, run_style))
                run_text, run_style = ch, st
        if run_text:
            segments.append(Segment(run_text, run_style))
        return Strip(segments, width)


class ScaleKey(Widget):
    """The shared diverging scale as a one-line bar with its limits (degrees of phase)."""

    DEFAULT_CSS = "ScaleKey { height: 1; width: 1fr; }"

    def __init__(self, *, id: str | None = None) -> None:
        super().__init__(id=id)
        self.limit = 1.0

    def set_limit(self, limit: float) -> None:
        self.limit = float(limit)
        self.refresh()

    def render_line(self, y: int) -> Strip:
        left = f"-{self.limit:.3g}° attractive "
        right = f" +{self.limit:.3g}° repulsive"
        bar_w = max(self.size.width - len(left) - len(right), 4)
        idx = np.round(np.linspace(0, LEVELS - 1, 2 * bar_w)).astype(int).reshape(bar_w, 2)
        segs = [Segment(left)]
        for a, b in idx.tolist():
            ch, st = DIVERGING.cell(a, a)
            segs.append(Segment(" ", Style(bgcolor=st.color)))
        segs.append(Segment(right))
        return Strip(segs, self.size.width)


class Field(Horizontal):
    """A label and a one-line input side by side (fits the 80 x 24 terminal); ``stacked`` puts the input on its
    own line under the label, for values that would not fit beside it.

    The input has no frame in either state, so its text stays visible when it has the focus (a framed one-line
    input shows only its frame); the focused field is marked by its background and a bold label instead.
    """

    DEFAULT_CSS = """
    Field { height: 1; }
    Field.stacked { layout: vertical; height: 2; }
    Field > Label { width: 16; }
    Field.stacked > Label { width: 1fr; }
    Field > Input { height: 1; border: none; padding: 0 1; width: 1fr; }
    Field > Input:focus { border: none; background: $accent 35%; }
    Field:focus-within > Label { text-style: bold; }
    Field > Input:disabled { opacity: 0.85; }
    """

    def __init__(self, label: str, value: str = "", *, id: str, placeholder: str = "", stacked: bool = False
                 ) -> None:
        super().__init__(id=f"{id}-field", classes="stacked" if stacked else None)
        self._label, self._value, self._input_id, self._placeholder = label, value, id, placeholder

    def compose(self):
        yield Label(self._label)
        yield Input(self._value, id=self._input_id, placeholder=self._placeholder)
