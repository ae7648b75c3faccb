"""The field series in the session file: ``field_series/<name>/``, next to the lift series in ``series/``.

Crash-safe in the same way as the lift series (see :mod:`assistant.storage.series_group`): every dataset is
chunked one scan line per chunk and allocated NaN-filled when the group is created; per line the data are written,
then the one counter ``completed_lines`` (lines over all field steps so far: step = completed // lines,
line = completed % lines), then the file is flushed. The field each step was measured at is written before the
step's first line.

Layout (NeXus NXdata, so general-purpose HDF5 viewers show the phase stack against the field)::

    field_series/<name>/    topography_m, phase_deg, amplitude_v, [repeat_phase_deg]  (fields, lines, pixels)
                            applied_field_a_per_m (fields,) the set fields; measured_field_a_per_m (fields,)
                            the field read after each step settled (NaN until then); axes y_m, x_m
                            attrs: completed_lines, lines, pixels, fields, scan_size_m, line_rate_hz,
                            lift_height_m, field_axis, repeat_first, order, settings_json

:class:`FieldSeriesGroups` gives :class:`~assistant.storage.session_file.SessionFile` its field-series methods;
continuing an interrupted field series is :func:`assistant.storage.resume.resume_field_writer`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import h5py
import numpy as np

from assistant.storage.records import FinishedSeriesError, SessionFileError, unit_for_name
from assistant.storage.series_group import BeforeWrite, axis_dataset, checked_scan_arguments, line_dataset

__all__ = ["FIELD_SERIES_GROUP", "FieldSeriesData", "FieldSeriesGroups", "FieldSeriesWriter"]

FIELD_SERIES_GROUP = "field_series"
_PASSES = ("topography_m", "phase_deg", "amplitude_v", "repeat_phase_deg")


@dataclass(frozen=True)
class FieldSeriesData:
    """A stored field series cut to its completed field steps (SI units; phase in degrees)."""

    name: str
    field_a_per_m: np.ndarray  # (fields,) every planned step
    measured_field_a_per_m: np.ndarray  # (fields,) NaN for steps not reached
    topography_m: np.ndarray  # (completed_steps, lines, pixels)
    phase_deg: np.ndarray
    amplitude_v: np.ndarray
    repeat_phase_deg: np.ndarray | None
    completed_lines: int  # over all steps
    lines: int
    pixels: int
    scan_size_m: float
    line_rate_hz: float
    lift_height_m: float
    field_axis: str
    settings_json: str
    resumed_at_lines: tuple[int, ...] = ()  # lines over all steps at which it was resumed (storage.resume.RESUMED_AT)

    @property
    def fields(self) -> int:
        return int(self.field_a_per_m.size)

    @property
    def completed_steps(self) -> int:
        return self.completed_lines // self.lines

    @property
    def finished(self) -> bool:
        return self.completed_lines >= self.fields * self.lines

    @property
    def pixel_m(self) -> tuple[float, float]:
        """(row, column) pixel size [m]: lines and pixels share the square frame."""
        return self.scan_size_m / self.lines, self.scan_size_m / self.pixels


class FieldSeriesWriter:
    """Writes a field series step by step and line by line, flushing after each line, through its session file
    (which refuses writes after a failed one)."""

    def __init__(self, session, group: h5py.Group, *, before_write: BeforeWrite | None) -> None:
        self._session = session
        self._group = group
        self._before_write = before_write
        self.name: str = group.name.rsplit("/", 1)[-1]
        self.lines = int(group.attrs["lines"])
        self.pixels = int(group.attrs["pixels"])
        self.fields = int(group.attrs["fields"])
        self.settings_json = str(group.attrs["settings_json"])
        self._datasets = {n: group[n] for n in _PASSES + ("measured_field_a_per_m",) if n in group}

    @property
    def completed_lines(self) -> int:
        return int(self._group.attrs["completed_lines"])

    @property
    def next_step_line(self) -> tuple[int, int]:
        """(field step, line) to write next."""
        return divmod(self.completed_lines, self.lines)

    def write_field(self, step: int, measured_a_per_m: float) -> None:
        """Record the field read once step ``step`` has settled (before its first line)."""
        if not 0 <= step < self.fields:
            raise SessionFileError(f"field series {self.name!r}: step {step} outside 0..{self.fields - 1}")
        with self._session._writing(f"the field of step {step} of {self.name!r}"):
            self._datasets["measured_field_a_per_m"][step] = float(measured_a_per_m)

    def write_line(self, step: int, line: int, *, topography_m: np.ndarray, phase_deg: np.ndarray,
                   amplitude_v: np.ndarray, repeat_phase_deg: np.ndarray | None = None) -> None:
        """Write line ``line`` of field step ``step`` (must be the next one), bump ``completed_lines``, flush."""
        index = step * self.lines + line
        done = self.completed_lines
        if not 0 <= line < self.lines or index != done:
            raise SessionFileError(f"field series {self.name!r}: step {step} line {line} is not the next line "
                                   f"(step {done // self.lines} line {done % self.lines})")
        if step >= self.fields:
            raise FinishedSeriesError(f"field series {self.name!r}: step {step} beyond its {self.fields} fields")
        values = {"topography_m": topography_m, "phase_deg": phase_deg, "amplitude_v": amplitude_v,
                  "repeat_phase_deg": repeat_phase_deg}
        if ("repeat_phase_deg" in self._datasets) != (repeat_phase_deg is not None):
            raise SessionFileError(f"field series {self.name!r}: the repeat pass must be given exactly when the "
                                   f"series was created with it")
        rows = {}
        for name, v in values.items():
            if v is None:
                continue
            data = np.asarray(v, dtype=np.float64)
            if data.shape != (self.pixels,):
                raise SessionFileError(f"field series {self.name!r}: {name} has shape {data.shape}, "
                                       f"expected ({self.pixels},)")
            rows[name] = data
        self._session.check_usable()
        if self._before_write is not None:
            self._before_write(index)
        try:
            for name, data in rows.items():
                self._datasets[name][step, line, :] = data
            # the counter goes last: a kill before the flush leaves the old count, the new line ignored
            self._group.attrs.modify("completed_lines", np.int64(index + 1))
            self._session.flush()
        except (OSError, ValueError, RuntimeError) as exc:  # h5py reports a full disk as any of these
            raise self._session.failed(f"step {step} line {line} of field series {self.name!r}", exc) from exc


class FieldSeriesGroups:
    """The ``field_series/`` groups of :class:`~assistant.storage.session_file.SessionFile` (a mixin: it uses the
    file's ``_h5``, ``path`` and ``_writing``, the guard that refuses writes after a failed one)."""

    def create_field_series(self, name: str, *, fields_a_per_m: Sequence[float], lines: int, pixels: int,
                            scan_size_m: float, line_rate_hz: float, lift_height_m: float, repeat_first: bool,
                            order: str, settings_json: str, field_axis: str = "z",
                            before_write: BeforeWrite | None = None) -> FieldSeriesWriter:
        """Create ``field_series/<name>`` with every dataset allocated and NaN-filled; returns its writer."""
        fields = checked_scan_arguments(name, fields_a_per_m, "fields_a_per_m", lines=lines, pixels=pixels,
                                        scan_size_m=scan_size_m, line_rate_hz=line_rate_hz,
                                        settings_json=settings_json)
        if name in self.field_series_names():
            raise SessionFileError(f"field series {name!r} already exists in {str(self.path)!r}; resume it instead")
        with self._writing(f"field series {name!r}"):
            g = _new_group(self._h5, name, fields, lines=int(lines), pixels=int(pixels),
                           scan_size_m=float(scan_size_m), line_rate_hz=float(line_rate_hz),
                           lift_height_m=float(lift_height_m), repeat_first=repeat_first, order=order,
                           settings_json=settings_json, field_axis=field_axis)
        return FieldSeriesWriter(self, g, before_write=before_write)

    def field_series_names(self) -> list[str]:
        """The names of the file's field series, sorted."""
        return sorted(self._h5[FIELD_SERIES_GROUP]) if FIELD_SERIES_GROUP in self._h5 else []

    def field_series_writer(self, name: str, *, before_write: BeforeWrite | None = None) -> FieldSeriesWriter:
        """A writer of the existing ``field_series/<name>`` at its next line (see :mod:`assistant.storage.resume`)."""
        return FieldSeriesWriter(self, self._field_series_group(name), before_write=before_write)

    def read_field_series(self, name: str) -> FieldSeriesData:
        """The stored field series, cut to the field steps whose every line was written."""
        return _read(self._field_series_group(name), name)

    def _field_series_group(self, name: str) -> h5py.Group:
        have = self.field_series_names()
        if name not in have:
            raise SessionFileError(f"no field series {name!r} in {str(self.path)!r}; have {have}")
        return self._h5[FIELD_SERIES_GROUP][name]


def _new_group(h5: h5py.File, name: str, fields: np.ndarray, *, lines: int, pixels: int, scan_size_m: float,
               line_rate_hz: float, lift_height_m: float, repeat_first: bool, order: str, settings_json: str,
               field_axis: str) -> h5py.Group:
    """``field_series/<name>`` with every dataset allocated and NaN-filled, with its NeXus view."""
    root = h5.require_group(FIELD_SERIES_GROUP)
    g = root.create_group(name)
    shape = (fields.size, lines, pixels)
    for ds in _PASSES if repeat_first else _PASSES[:-1]:
        line_dataset(g, ds, shape)
    axis_dataset(g, "applied_field_a_per_m", fields, "A/m")
    dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    dcpl.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)
    measured = g.create_dataset("measured_field_a_per_m", shape=(fields.size,), dtype=np.float64,
                                fillvalue=np.nan, dcpl=dcpl)
    measured.attrs["units"] = unit_for_name("measured_field_a_per_m")
    axis_dataset(g, "y_m", np.arange(lines) * (scan_size_m / lines), "m")
    axis_dataset(g, "x_m", np.arange(pixels) * (scan_size_m / pixels), "m")
    axes = ["applied_field_a_per_m", "y_m", "x_m"]
    g.attrs.update({
        "NX_class": "NXdata", "signal": "phase_deg", "axes": axes,
        "auxiliary_signals": ["amplitude_v"] + (["repeat_phase_deg"] if repeat_first else []),
        "completed_lines": np.int64(0), "lines": np.int64(lines), "pixels": np.int64(pixels),
        "fields": np.int64(fields.size), "scan_size_m": scan_size_m, "line_rate_hz": line_rate_hz,
        "lift_height_m": lift_height_m, "field_axis": field_axis, "repeat_first": bool(repeat_first),
        "order": order, "settings_json": settings_json,
    })
    for i, axis in enumerate(axes):
        g.attrs[f"{axis}_indices"] = np.int64(i)
    root.attrs["NX_class"] = "NXentry"
    root.attrs["default"] = name
    if "series" not in h5:
        h5.attrs["default"] = FIELD_SERIES_GROUP
    return g


def _read(g: h5py.Group, name: str) -> FieldSeriesData:
    from assistant.storage.resume import resumed_at

    lines = int(g.attrs["lines"])
    done = int(g.attrs["completed_lines"])
    steps = done // lines
    rep = g["repeat_phase_deg"][:steps] if "repeat_phase_deg" in g else None
    return FieldSeriesData(
        name=name, field_a_per_m=g["applied_field_a_per_m"][()], measured_field_a_per_m=g["measured_field_a_per_m"][()],
        topography_m=g["topography_m"][:steps], phase_deg=g["phase_deg"][:steps], amplitude_v=g["amplitude_v"][:steps],
        repeat_phase_deg=rep, completed_lines=done, lines=lines, pixels=int(g.attrs["pixels"]),
        scan_size_m=float(g.attrs["scan_size_m"]), line_rate_hz=float(g.attrs["line_rate_hz"]),
        lift_height_m=float(g.attrs["lift_height_m"]), field_axis=str(g.attrs["field_axis"]),
        settings_json=str(g.attrs["settings_json"]), resumed_at_lines=resumed_at(g))
