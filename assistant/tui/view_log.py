"""Log view: every Notice of every procedure, and the app's own messages, with their level."""

from __future__ import annotations

from datetime import datetime

from rich.text import Text
from textual.widgets import RichLog

from assistant.tui.view_base import View

#: Level marks that do not rely on colour alone (they read on dark, light and monochrome terminals).
_MARK = {"info": ("·", ""), "warning": ("!", "bold"), "error": ("✖", "bold reverse")}


class LogView(View):
    DEFAULT_CSS = "LogView RichLog { height: 1fr; }"

    def __init__(self, **kw) -> None:
        super().__init__(**kw)
        self.entries: list[tuple[str, str]] = []

    def compose(self):
        # min_width: RichLog wraps at the larger of its width and min_width (78 by default), which cut long
        # lines off at the right edge of an 80-column terminal
        yield RichLog(wrap=True, markup=False, min_width=20, id="log")

    def add(self, level: str, text: str, *, clock=datetime.now) -> None:
        self.entries.append((level, text))
        mark, style = _MARK.get(level, ("·", ""))
        line = Text(f"{clock():%H:%M:%S} {mark} ")
        line.append(text, style=style)
        self.query_one("#log", RichLog).write(line)
