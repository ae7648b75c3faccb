"""Continuing an interrupted session: where its last series stopped, and a writer that goes on from there.

A run that was killed (or lost its link, or filled the disk) leaves a session file whose last series has fewer
``completed_lines`` than ``lines``; every counted line is intact. :func:`resume_point` reads what a resume
needs (the series, its stored settings and the next line); :func:`resume_writer` continues the series.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

from assistant.storage.records import FinishedSeriesError, SessionFileError
from assistant.storage.series_group import BeforeWrite, SeriesWriter

__all__ = ["ResumePoint", "resume_point", "resume_writer"]


@dataclass(frozen=True)
class ResumePoint:
    """The series to continue: its name, lines done of all, and its settings as stored (parsed JSON)."""

    series_name: str
    completed_lines: int
    lines: int
    settings: dict


def resume_point(session) -> ResumePoint:
    """Where the last series of ``session`` (a :class:`~assistant.storage.session_file.SessionFile`) stopped.

    Raises :class:`SessionFileError` for a file without series and :class:`FinishedSeriesError` when the last
    series is complete (nothing to resume).
    """
    names = session.series_names()
    if not names:
        raise SessionFileError(f"{session.path} has no series to resume")
    data = session.read_series(names[-1])
    if data.finished:
        raise FinishedSeriesError(f"series {names[-1]!r} in {session.path} is already complete; nothing to resume")
    return ResumePoint(names[-1], data.completed_lines, data.lines, json.loads(data.settings_json))


def resume_writer(session, name: str, *, before_write: BeforeWrite | None = None) -> SeriesWriter:
    """A writer that continues ``series/<name>`` at its next line; refuses a finished series. The session is
    marked as not complete while the series goes on."""
    writer = session.series_writer(name, before_write=before_write)
    done, lines = writer.completed_lines, writer.lines
    if done >= lines:
        raise FinishedSeriesError(f"series {name!r} is finished ({done} of {lines} lines); nothing to resume")
    session.mark_complete(False)
    return writer
