"""The session file: one HDF5 file per session, written as acquired and safe against a killed process.

Why it survives a SIGKILL: the file uses HDF5's default (earliest-compatible) format, every dataset is
chunked one scan line per chunk with *all chunks allocated when the series is created* (so writing a line
touches raw data only, never the chunk index), the line counter ``completed_lines`` is rewritten in place
*after* the line's data, and the file is flushed after every line. A killed writer therefore leaves a file that
opens with a plain ``h5py.File(path, "r")`` and holds every line counted in ``completed_lines``. A flush hands
the data to the operating system only; ``fsync=True`` also survives a power cut, at a cost per line.

Layout (NeXus NXdata attributes so general-purpose HDF5 viewers plot the images)::

    /                       format, format_version, software_version, created_utc, controller_url,
                            scenario_text (simulated only), complete; NX_class=NXroot, default=series
    probe/<n>/              one calibration: scalars as attributes (units in ``scalar_units``), arrays
    resonance/, approach/   the last resonance sweep / approach: scalars as attributes, arrays
    series/<name>/          NXdata: topography_m (lines, pixels); phase_deg, amplitude_v (heights, [biases,]
                            lines, pixels); optional frequency_shift_hz, repeat_phase_deg (lines, pixels);
                            axes lift_height_m, [tip_bias_v,] y_m, x_m; sub-group topography/ (NXdata view)
    field_series/<name>/    NXdata: one image per applied-field step (see assistant.storage.field_series_group)
    analysis/<name>/        decomposition (or loop) results: scalars as attributes, arrays as datasets; result/
                            the whole result as computed (every field, dtypes kept), from which the report draws
    field_map/<name>/       stray-field map of series <name> (quantitative MFM): hz_a_per_m, hz_std_a_per_m
                            (rows, cols), scalars (height_nm, pixel spacing, band, the TTF used) as attributes

The series group is :mod:`assistant.storage.series_group`, the field series
:mod:`assistant.storage.field_series_group`, the records and errors :mod:`assistant.storage.records`, continuing
an interrupted series :mod:`assistant.storage.resume`, and the stray-field maps
:mod:`assistant.storage.field_map_group`.
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Literal

import h5py
import numpy as np

from assistant.storage.field_map_group import FieldMapGroups
from assistant.storage.field_series_group import FieldSeriesGroups
from assistant.storage.records import (FORMAT_NAME, FORMAT_VERSION, MAX_ATTR_TEXT, FormatVersionError,
                                       NotASessionFileError, Record, Scalar, SessionBusyError, SessionFileError,
                                       SessionInfo, SessionWriteError, UnwritablePathError, check_name,
                                       checked_record, fill_group, read_record, redact_controller_url)
from assistant.storage.series_group import (BeforeWrite, SeriesData, SeriesWriter, checked_series_arguments,
                                            new_series_group, read_series)

__all__ = ["SessionFile"]

#: The subgroup of ``analysis/<name>/`` that holds the whole result as computed.
RESULT_GROUP = "result"


class SessionFile(FieldMapGroups, FieldSeriesGroups):
    """An open session file. Create with :meth:`create`, reopen with :meth:`open`; use as a context manager.
    Stray-field maps are kept by :class:`FieldMapGroups`, field series by :class:`FieldSeriesGroups`."""

    def __init__(self, h5: h5py.File, *, fsync: bool) -> None:
        self._h5 = h5
        self._fsync = fsync
        self._broken: str | None = None  # set by a failed write: the HDF5 state is no longer trustworthy
        self.path = Path(h5.filename)

    # ---- opening -------------------------------------------------------------------------------------
    @classmethod
    def create(cls, path: str | os.PathLike[str], *, controller_url: str, scenario_text: str | None = None,
               software_version: str, fsync: bool = False, now: datetime | None = None,
               run_plan_json: str | None = None) -> "SessionFile":
        """Create a new session file; refuses to overwrite an existing file. ``controller_url`` is stored
        without secrets; ``run_plan_json``, what the run was asked to do (JSON), as the root attribute
        ``run_plan_json`` (``info()`` reads it), so that a run stopped before its series began can be resumed.

        The file is written under a hidden temporary name beside ``path`` and renamed to ``path`` once its root
        attributes (and the plan) are on disk, so a run stopped at any moment (Ctrl-C, a kill, a power cut)
        leaves either no session file or one that says what it was for. A stop while the temporary file is
        written removes it, except after SIGKILL or a power cut (a ``.<name>.<pid>.creating`` file, never read)."""
        path = Path(path)
        if path.exists():
            raise UnwritablePathError(f"session file {str(path)!r} already exists; choose a new name")
        for what, text in (("scenario text", scenario_text), ("run plan", run_plan_json)):
            if text is not None and len(text.encode()) > MAX_ATTR_TEXT:
                raise SessionFileError(f"{what} is {len(text.encode())} bytes; limit {MAX_ATTR_TEXT}")
        _write_new_file(path, fsync=fsync, attrs=dict(
            controller_url=controller_url, scenario_text=scenario_text, software_version=software_version,
            run_plan_json=run_plan_json, created=(now or datetime.now(timezone.utc)).astimezone(timezone.utc)))
        return cls(_open_h5(path, "a"), fsync=fsync)

    @classmethod
    def open(cls, path: str | os.PathLike[str], mode: Literal["r", "a"] = "r", *,
             fsync: bool = False) -> "SessionFile":
        """Open an existing session file for reading (``"r"``) or to add to it (``"a"``)."""
        if mode not in ("r", "a"):
            raise SessionFileError(f"mode must be 'r' or 'a', got {mode!r}")
        return cls(_open_h5(Path(path), mode), fsync=fsync)

    def __enter__(self) -> "SessionFile":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the file. After a failed write, closing cannot fail: what reached the disk stays as it is."""
        if not self._h5.id.valid:
            return
        if self._broken is None:
            self._h5.close()
            return
        try:
            self._h5.close()
        except (OSError, ValueError, RuntimeError):
            pass  # the failure was already reported; HDF5 cannot write its caches out either

    def flush(self) -> None:
        """Hand everything to the operating system; with ``fsync`` also to the disk."""
        self._h5.flush()
        if self._fsync:
            os.fsync(self._h5.id.get_vfd_handle())

    # ---- failed writes (also for the group writers) --------------------------------------------------
    def check_usable(self) -> None:
        """Refuse to write after a failed write (the HDF5 state is no longer trustworthy)."""
        if self._broken is not None:
            raise SessionWriteError(f"an earlier write to {str(self.path)!r} failed ({self._broken}); "
                                    "close the file and reopen it with mode 'a' to resume")

    def failed(self, what: str, exc: BaseException) -> SessionWriteError:
        """Mark the file broken by a failed write of ``what``; the error to raise."""
        self._broken = f"{what}: {exc}".splitlines()[0]
        errno = exc.errno if isinstance(exc, OSError) else None
        return SessionWriteError(errno, f"writing {what} to {str(self.path)!r} failed: {self._broken}; "
                                        "every line counted in completed_lines before it is intact")

    @contextmanager
    def _writing(self, what: str) -> Iterator[None]:
        self.check_usable()
        try:
            yield
            self.flush()
        except SessionFileError:
            raise
        except (OSError, ValueError, RuntimeError) as exc:  # h5py reports a full disk as any of these
            raise self.failed(what, exc) from exc

    # ---- writing records -----------------------------------------------------------------------------
    def write_calibration(self, scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None = None, *,
                          plot: tuple[str, str] | None = None) -> str:
        """Add a probe calibration as ``probe/<n>``; returns that path.

        Scalar and array names carry their unit as a suffix (``k_n_per_m``, ``psd_v2_per_hz``).
        ``plot=(signal, axis)`` names the array to show first in a viewer and its axis array.
        """
        record = checked_record(scalars, arrays, plot)
        with self._writing("a calibration"):
            parent = self._h5.require_group("probe")
            parent.attrs["NX_class"] = "NXcollection"
            group = parent.create_group(str(len(parent)))
            fill_group(group, *record)
        return group.name.lstrip("/")

    def write_resonance(self, scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None = None, *,
                        plot: tuple[str, str] | None = None) -> None:
        """Store the resonance sweep and its fit as ``resonance/`` (replacing an earlier one)."""
        record = checked_record(scalars, arrays, plot)
        with self._writing("the resonance"):
            fill_group(self._fresh_group("resonance"), *record)

    def write_approach(self, scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None = None, *,
                       plot: tuple[str, str] | None = None) -> None:
        """Store the approach trace and result as ``approach/`` (replacing an earlier one)."""
        record = checked_record(scalars, arrays, plot)
        with self._writing("the approach"):
            fill_group(self._fresh_group("approach"), *record)

    def write_analysis(self, name: str, scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None = None,
                       *, result: tuple[Mapping[str, Scalar], Mapping[str, np.ndarray]] | None = None) -> None:
        """Store decomposition results as ``analysis/<name>/`` (replacing earlier results of that name).

        ``result``: the whole result as (scalars, arrays), kept in ``analysis/<name>/result`` with the arrays'
        dtypes, so that it can be read back exactly (:meth:`read_analysis_result`).
        """
        check_name(name)
        record = checked_record(scalars, arrays, None)
        whole = None if result is None else checked_record(*result, keep_dtype=True)
        with self._writing(f"analysis {name!r}"):
            parent = self._h5.require_group("analysis")
            parent.attrs["NX_class"] = "NXcollection"
            if name in parent:
                del parent[name]
            group = parent.create_group(name)
            fill_group(group, *record)
            if whole is not None:
                fill_group(group.create_group(RESULT_GROUP), *whole)

    def mark_complete(self, complete: bool = True) -> None:
        """Mark the session as finished normally (or, resuming it, as not finished again)."""
        if not complete and not bool(self._h5.attrs.get("complete", False)):
            return  # already marked unfinished: nothing to write
        with self._writing("the complete flag"):
            self._h5.attrs["complete"] = complete

    def _fresh_group(self, name: str) -> h5py.Group:
        if name in self._h5:
            del self._h5[name]
        return self._h5.create_group(name)

    # ---- series --------------------------------------------------------------------------------------
    def create_series(self, name: str, *, heights_m: Sequence[float], biases_v: Sequence[float] | None, lines: int,
                      pixels: int, scan_size_m: float, line_rate_hz: float, order: str, repeat_first: bool,
                      settings_json: str, frequency_shift: bool = False,
                      before_write: BeforeWrite | None = None) -> SeriesWriter:
        """Create ``series/<name>`` with every dataset allocated and NaN-filled; returns its writer.

        ``biases_v=None`` (or empty) gives phase of shape (heights, lines, pixels); a sequence gives
        (heights, biases, lines, pixels). The frame is square, ``scan_size_m`` on a side.
        ``frequency_shift=True`` allocates ``frequency_shift_hz`` now; otherwise it is added at the first line
        that carries it.
        """
        heights, biases = checked_series_arguments(name, heights_m, biases_v, lines=lines, pixels=pixels,
                                                   scan_size_m=scan_size_m, line_rate_hz=line_rate_hz,
                                                   settings_json=settings_json)
        if name in self.series_names():
            raise SessionFileError(f"series {name!r} already exists in {str(self.path)!r}; resume it instead")
        with self._writing(f"series {name!r}"):
            g = new_series_group(self._h5, name, heights, biases, lines=int(lines), pixels=int(pixels),
                                 scan_size_m=float(scan_size_m), line_rate_hz=float(line_rate_hz), order=order,
                                 repeat_first=repeat_first, settings_json=settings_json,
                                 frequency_shift=frequency_shift)
        return SeriesWriter(self, g, before_write=before_write)

    def series_writer(self, name: str, *, before_write: BeforeWrite | None = None) -> SeriesWriter:
        """A writer of the existing ``series/<name>`` at its next line (see :mod:`assistant.storage.resume`)."""
        return SeriesWriter(self, self._series_group(name), before_write=before_write)

    # ---- reading -------------------------------------------------------------------------------------
    def info(self) -> SessionInfo:
        a = self._h5.attrs
        scenario = a.get("scenario_text")
        return SessionInfo(format=str(a["format"]), format_version=int(a["format_version"]),
                           software_version=str(a["software_version"]), created_utc=str(a["created_utc"]),
                           controller_url=str(a["controller_url"]),
                           scenario_text=None if scenario is None else str(scenario),
                           complete=bool(a["complete"]),
                           run_plan_json=None if a.get("run_plan_json") is None else str(a["run_plan_json"]))

    def series_names(self) -> list[str]:
        return sorted(self._h5["series"]) if "series" in self._h5 else []

    def read_series(self, name: str) -> SeriesData:
        """Arrays and attributes of ``series/<name>``, holding only the completed lines."""
        return read_series(self._series_group(name), name)

    def read_calibrations(self) -> list[Record]:
        """Every ``probe/<n>`` record, oldest first."""
        if "probe" not in self._h5:
            return []
        parent = self._h5["probe"]
        return [read_record(parent[k]) for k in sorted(parent, key=int)]

    def read_resonance(self) -> Record | None:
        return read_record(self._h5["resonance"]) if "resonance" in self._h5 else None

    def read_approach(self) -> Record | None:
        return read_record(self._h5["approach"]) if "approach" in self._h5 else None

    def analysis_names(self) -> list[str]:
        return sorted(self._h5["analysis"]) if "analysis" in self._h5 else []

    def read_analysis(self, name: str) -> Record:
        if name not in self.analysis_names():
            raise SessionFileError(f"no analysis {name!r} in {str(self.path)!r}; have {self.analysis_names()}")
        return read_record(self._h5["analysis"][name])

    def read_analysis_result(self, name: str) -> Record | None:
        """The whole result stored with analysis ``name`` (None when there is no such analysis or it was stored
        without its result)."""
        group = self._h5["analysis"].get(name) if "analysis" in self._h5 else None
        return None if group is None or RESULT_GROUP not in group else read_record(group[RESULT_GROUP])

    def _series_group(self, name: str) -> h5py.Group:
        if name not in self.series_names():
            raise SessionFileError(f"no series {name!r} in {str(self.path)!r}; have {self.series_names()}")
        return self._h5["series"][name]


def _open_h5(path: Path, mode: str) -> h5py.File:
    """The HDF5 file of an existing session file, checked to be one of a version this software reads."""
    if not path.is_file():
        raise NotASessionFileError(f"{str(path)!r} does not exist or is not a file")
    try:
        h5 = h5py.File(path, "r+" if mode == "a" else "r")
    except OSError as exc:
        if "unable to lock file" in str(exc):
            raise SessionBusyError(f"session file {str(path)!r} is open for writing by another process "
                                   "(a run in progress?); wait for it to finish") from exc
        if mode == "a" and not os.access(path, os.W_OK):
            raise UnwritablePathError(f"session file {str(path)!r} is not writable") from exc
        raise NotASessionFileError(f"{str(path)!r} is not an HDF5 session file ({exc})") from exc
    try:
        fmt = h5.attrs.get("format")
        if fmt != FORMAT_NAME:
            raise NotASessionFileError(f"{str(path)!r} is not a session file (format {fmt!r}, "
                                       f"expected {FORMAT_NAME!r})")
        version = int(h5.attrs.get("format_version", -1))
        if version != FORMAT_VERSION:
            raise FormatVersionError(f"{str(path)!r} has session format version {version}; "
                                     f"this software reads version {FORMAT_VERSION}")
    except BaseException:
        h5.close()
        raise
    return h5


def _write_new_file(path: Path, *, fsync: bool, attrs: dict) -> None:
    """Write a session file's root attributes under a hidden name beside ``path``, then give it the name ``path``
    (:func:`_publish`). The hidden name carries the process id: two runs started in the same second in one folder
    pick the same ``path`` (``outputs.new_session_path``), and must not write into each other's file."""
    partial = path.with_name(f".{path.name}.{os.getpid()}.creating")
    try:
        h5 = h5py.File(partial, "w")
    except OSError as exc:
        raise UnwritablePathError(f"cannot create session file {str(path)!r}: {exc}") from exc
    try:
        with h5:
            _write_root_attributes(h5.attrs, **attrs)
            h5.flush()
            if fsync:
                os.fsync(h5.id.get_vfd_handle())
        _publish(partial, path)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise
    if fsync and hasattr(os, "O_DIRECTORY"):  # a power cut must not lose the new file's directory entry
        folder = os.open(path.resolve().parent, os.O_RDONLY | os.O_DIRECTORY)
        try:
            os.fsync(folder)
        finally:
            os.close(folder)


def _publish(partial: Path, path: Path) -> None:
    """Give the finished file ``partial`` the name ``path``, never over a file that took that name meanwhile (the
    other run's session): a hard link fails where the name exists, and the hidden name is then removed. On a
    file system without hard links (FAT), a rename after a check, which leaves a moment for such a race."""
    try:
        os.link(partial, path)
    except OSError as exc:
        if isinstance(exc, FileExistsError) or path.exists():
            raise UnwritablePathError(f"session file {str(path)!r} already exists; choose a new name") from None
        os.replace(partial, path)
        return
    partial.unlink()


def _write_root_attributes(attrs, *, controller_url: str, scenario_text: str | None, software_version: str,
                           run_plan_json: str | None, created: datetime) -> None:
    attrs["format"] = FORMAT_NAME
    attrs["format_version"] = np.int64(FORMAT_VERSION)
    attrs["software_version"] = software_version
    attrs["created_utc"] = created.isoformat(timespec="seconds").replace("+00:00", "Z")
    attrs["controller_url"] = redact_controller_url(controller_url)
    if scenario_text is not None:
        attrs["scenario_text"] = scenario_text
    if run_plan_json is not None:
        attrs["run_plan_json"] = run_plan_json
    attrs["complete"] = False
    attrs["NX_class"] = "NXroot"
