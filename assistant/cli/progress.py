"""Progress of a command on stderr: rich bars with named stages on a terminal, plain lines elsewhere.

Procedures report ``Progress(what, done, total, unit, ...)`` and ``Notice(level, text)``; this renders them.
Each ``what`` belongs to a stage (the calibration's thermal record, spectrum, fit and drive sweep are one stage,
"calibration"); the command adds its own stages around work that does not report (``with progress.stage(
"analysis"):``). Numbers are written by :mod:`assistant.formatting`: "approach 31.8 of 300 µm", never
"3.17749e-05/0.0003 m". When stderr is not a terminal, plain lines with the same text come at most once a second
(the latest state is written when the command ends). Nothing goes to stdout, so ``--json`` output stays one object.
"""

from __future__ import annotations

import sys
import time
from contextlib import contextmanager

from assistant.formatting import duration, progress_text

#: The stage each procedure step belongs to (a step not listed is a stage of its own).
STAGE_OF = {"thermal record": "calibration", "thermal spectrum": "calibration", "thermal fit": "calibration",
            "drive sweep": "calibration", "sweep fit": "calibration", "force curve": "calibration",
            "approach": "approach", "series": "series", "analysis": "analysis", "report": "report",
            "field series": "field series"}


def event_text(event) -> str:
    """One line for a Progress event: what, how far, time left."""
    if event.total is None and not event.unit:
        text = event.what
    elif event.unit == "fit":
        text = f"{event.what}: done" if event.total and event.done >= event.total else event.what
    else:
        text = progress_text(event.what, event.done, event.total, event.unit)
    if event.remaining_s is not None and event.total is not None and event.done < event.total:
        text += f", about {duration(event.remaining_s)} left"
    return text


def notice_text(notice) -> str:
    """A Notice as one line; the safety guard's stop notice says only what it did (the error comes once, later)."""
    if getattr(notice, "kind", "") == "stopped":  # what the guard did: after the error's own text
        return "stopped: " + notice.text.rsplit("); ", 1)[-1]
    mark = {"warning": "warning: ", "error": "error: "}.get(notice.level, "")
    return mark + notice.text


class StageProgress:
    """A procedure sink for the command line. Use as a context manager so a live display always ends.

    ``tty`` forces the mode (default: whether ``stream`` is a terminal); ``interval_s`` is the least time between
    plain lines; ``clock`` is injectable for tests.
    """

    def __init__(self, *, stream=None, tty: bool | None = None, interval_s: float = 1.0, clock=time.monotonic,
                 quiet: bool = False) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.tty = self.stream.isatty() if tty is None else tty
        self.interval_s = interval_s
        self.clock = clock
        self.quiet = quiet
        self.notices: list[tuple[str, str]] = []
        self._last_line = -1e18
        self._pending: str | None = None
        self._bars = None
        self._tasks: dict[str, int] = {}
        self._current: str | None = None

    # ---- sink -----------------------------------------------------------------------------------------------
    def __call__(self, event) -> None:
        from assistant.procedures.events import Notice

        if isinstance(event, Notice):
            self.notices.append((event.level, event.text))
            if not self.quiet:
                self._write_notice(notice_text(event))
            return
        if self.quiet:
            return
        stage = STAGE_OF.get(event.what, event.what)
        text = event_text(event)
        fraction = None
        if event.total:
            fraction = min(max(event.done / event.total, 0.0), 1.0)
        if self.tty:
            self._bar(stage, text, fraction)
        else:
            self._line(text, stage, final=fraction == 1.0)

    @contextmanager
    def stage(self, name: str, detail: str | None = None):
        """A stage of the command's own (no progress events inside): shown as running, then done."""
        if not self.quiet and self.tty:  # plain lines say only that it ended (an error is then one line alone)
            self._bar(name, detail or name, None)
        t0 = self.clock()
        yield
        if not self.quiet:
            done = f"{detail or name}: done in {duration(self.clock() - t0)}"
            if self.tty:
                self._bar(name, done, 1.0)
            else:
                self._line(done, name)

    # ---- plain lines ----------------------------------------------------------------------------------------
    def _line(self, text: str, stage: str, *, final: bool = False) -> None:
        """A plain line at most once a second; a step's last line (``final``: all of it done) at once, so that it
        comes before whatever the command writes next."""
        now = self.clock()
        if stage != self._current:  # a stage ended: its last state is written before the next stage's lines
            if self._pending is not None:
                self.stream.write(self._pending + "\n")
                self._pending = None
            self._current = stage
        if final or now - self._last_line >= self.interval_s:
            self.stream.write(text + "\n")
            self.stream.flush()
            self._last_line = now
            self._pending = None
        else:
            self._pending = text

    def _write_notice(self, text: str) -> None:
        if self._bars is not None:
            self._bars.console.print(text, markup=False, highlight=False)
        else:
            if self._pending is not None:  # the progress held back came first: it goes before the notice
                self.stream.write(self._pending + "\n")
                self._pending = None
            self.stream.write(text + "\n")
            self.stream.flush()

    # ---- rich bars ------------------------------------------------------------------------------------------
    def _bar(self, stage: str, text: str, fraction: float | None) -> None:
        if self._bars is None:
            from rich.console import Console
            from rich.progress import BarColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

            self._bars = Progress(SpinnerColumn(finished_text="✓"), TextColumn("{task.fields[stage]:<12}"),
                                  BarColumn(bar_width=24), TextColumn("{task.fields[detail]}"),
                                  TimeElapsedColumn(), console=Console(file=self.stream, stderr=True),
                                  transient=False, refresh_per_second=8)
            self._bars.start()
        if self._current is not None and self._current != stage:
            self._finish(self._current)
        self._current = stage
        if stage not in self._tasks:
            self._tasks[stage] = self._bars.add_task(stage, total=None, stage=stage, detail=text)
        task = self._tasks[stage]
        if fraction is None:
            self._bars.update(task, detail=text)
        else:
            self._bars.update(task, total=1.0, completed=fraction, detail=text)

    def _finish(self, stage: str) -> None:
        task = self._tasks.get(stage)
        if task is not None and self._bars is not None:
            self._bars.update(task, total=1.0, completed=1.0)
            self._bars.stop_task(task)

    def close(self) -> None:
        if self._bars is not None:
            if self._current is not None:
                self._finish(self._current)
            self._bars.stop()
            self._bars = None
        if self._pending is not None:
            self.stream.write(self._pending + "\n")
            self.stream.flush()
            self._pending = None

    def __enter__(self) -> StageProgress:
        return self

    def __exit__(self, *exc) -> None:
        # An error: the bar of the stage that failed stays where it stopped (not marked done).
        if exc[0] is not None and self._current is not None:
            self._tasks.pop(self._current, None)
        self.close()
