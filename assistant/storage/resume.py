"""Continuing an interrupted session: where its last series stopped, and a writer that goes on from there.

A run that was killed (or lost its link, or filled the disk) leaves a session file whose last series (a lift
series in ``series/`` or a field series in ``field_series/``) has fewer ``completed_lines`` than it planned; every
counted line is intact. :func:`resume_point` reads what a resume needs (which series, its stored settings and the
next line); :func:`resume_writer` and :func:`resume_field_writer` continue the series.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np

from assistant.storage.field_series_group import FieldSeriesWriter
from assistant.storage.records import FinishedSeriesError, SessionFileError
from assistant.storage.series_group import BeforeWrite, SeriesWriter

__all__ = ["ResumePoint", "resume_field_writer", "resume_point", "resume_writer"]

#: The attribute of a series group that lists the lines at which it was resumed (after a new approach; a lateral
#: offset between the parts is not measured), so that the analysis and the report can say where the seams are.
RESUMED_AT = "resumed_at_lines"

#: ``ResumePoint.kind`` of a lift series (``series/``) and of a field series (``field_series/``).
LIFT_SERIES, FIELD_SERIES = "series", "field_series"


@dataclass(frozen=True)
class ResumePoint:
    """The series to continue: its name, lines done of all (over every field step for a field series), its
    settings as stored (parsed JSON), and its kind (:data:`LIFT_SERIES` or :data:`FIELD_SERIES`)."""

    series_name: str
    completed_lines: int
    lines: int
    settings: dict
    kind: str = LIFT_SERIES


def resume_point(session) -> ResumePoint:
    """Where the last series of ``session`` (a :class:`~assistant.storage.session_file.SessionFile`) stopped.

    An unfinished lift series is continued first; otherwise the last field series, if it is unfinished. Raises
    :class:`SessionFileError` for a file without series and :class:`FinishedSeriesError` when the last series is
    complete (nothing to resume).
    """
    names, field_names = session.series_names(), session.field_series_names()
    if not names and not field_names:
        raise SessionFileError(f"{session.path} has no series to resume")
    if names:
        data = session.read_series(names[-1])
        if not data.finished:
            return ResumePoint(names[-1], data.completed_lines, data.lines, json.loads(data.settings_json))
    if field_names:
        fs = session.read_field_series(field_names[-1])
        if not fs.finished:
            return ResumePoint(field_names[-1], fs.completed_lines, fs.fields * fs.lines,
                               json.loads(fs.settings_json), FIELD_SERIES)
    last = f"series {names[-1]!r}" if names else f"field series {field_names[-1]!r}"
    if names and field_names:
        last = f"series {names[-1]!r} and field series {field_names[-1]!r}"
    raise FinishedSeriesError(f"{last} in {session.path} {'are' if names and field_names else 'is'} already "
                              f"complete; nothing to resume")


def resume_writer(session, name: str, *, before_write: BeforeWrite | None = None) -> SeriesWriter:
    """A writer that continues ``series/<name>`` at its next line; refuses a finished series. The session is
    marked as not complete while the series goes on."""
    writer = session.series_writer(name, before_write=before_write)
    done, lines = writer.completed_lines, writer.lines
    if done >= lines:
        raise FinishedSeriesError(f"series {name!r} is finished ({done} of {lines} lines); nothing to resume")
    session.mark_complete(False)
    _mark_resumed(session, writer, done)
    return writer


def resume_field_writer(session, name: str, *, before_write: BeforeWrite | None = None) -> FieldSeriesWriter:
    """A writer that continues ``field_series/<name>`` at its next line; refuses a finished field series. The
    session is marked as not complete while the series goes on."""
    writer = session.field_series_writer(name, before_write=before_write)
    done, total = writer.completed_lines, writer.fields * writer.lines
    if done >= total:
        raise FinishedSeriesError(f"field series {name!r} is finished ({done} of {total} lines); nothing to resume")
    session.mark_complete(False)
    _mark_resumed(session, writer, done)
    return writer


def _mark_resumed(session, writer, done: int) -> None:
    """Add ``done`` to the series' :data:`RESUMED_AT` (nothing when no line was written before the resume)."""
    if done == 0:
        return
    group = writer._group
    with session._writing(f"the resume point of {writer.name!r}"):
        old = np.asarray(group.attrs.get(RESUMED_AT, np.zeros(0)), dtype=np.int64).ravel()
        group.attrs[RESUMED_AT] = np.append(old, np.int64(done))


def resumed_at(group) -> tuple[int, ...]:
    """The lines (counted over every field step for a field series) at which a stored series was resumed."""
    return tuple(int(v) for v in np.asarray(group.attrs.get(RESUMED_AT, np.zeros(0)), dtype=np.int64).ravel())


def resumed_sentence(resumed_at_lines: tuple[int, ...], lines: int, *, field_steps: bool = False) -> str | None:
    """Where a stored series was resumed, for people (None if it never was); ``lines`` is lines per image."""
    if not resumed_at_lines:
        return None
    where = [f"field step {k // lines + 1}, line {k % lines + 1}" if field_steps else f"line {k + 1}"
             for k in resumed_at_lines]
    return (f"resumed at {', '.join(where)} of {lines} lines per image: what follows was taken after a new approach, "
            "and an offset between the parts (drift, the coarse motor) is neither measured nor corrected; the "
            "standard errors do not include it")
