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
    analysis/<name>/        decomposition results: scalars as attributes, arrays as datasets
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Literal
from urllib.parse import parse_qsl, urlencode, urlsplit, urlunsplit

import h5py
import numpy as np

FORMAT_NAME = "mfm-assistant-session"
FORMAT_VERSION = 1


# ---- errors ---------------------------------------------------------------------------------------------
class SessionFileError(ValueError):
    """Root of the session-file errors; each message is one line naming the file and the problem."""


class NotASessionFileError(SessionFileError):
    """The path is missing, not HDF5, or an HDF5 file of some other kind."""


class FormatVersionError(SessionFileError):
    """A session file of a format version this software does not read."""


class FinishedSeriesError(SessionFileError):
    """A resume or a write was asked of a series whose lines are all written."""


class UnwritablePathError(SessionFileError):
    """The file cannot be created or opened for writing."""


class SessionBusyError(SessionFileError):
    """Another process has the file open for writing (HDF5 file locking refused to open it)."""


class SessionWriteError(OSError):
    """Writing to the file failed (typically a full disk). Every line counted in ``completed_lines`` before
    the failure stays readable; close the file (further writes are refused) and reopen it to resume."""


# ---- results of reading ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class SessionInfo:
    """The root attributes of a session file."""

    format: str
    format_version: int
    software_version: str
    created_utc: str
    controller_url: str
    scenario_text: str | None
    complete: bool


@dataclass(frozen=True)
class Record:
    """A stored group (calibration, resonance, approach, analysis): scalars, arrays, and the unit of each."""

    path: str
    scalars: dict[str, float | int | str | bool]
    arrays: dict[str, np.ndarray]
    units: dict[str, str]


@dataclass(frozen=True)
class SeriesData:
    """One lift-height series as stored, cut to its completed lines (SI units; phase in degrees)."""

    name: str
    topography_m: np.ndarray  # (completed_lines, pixels)
    phase_deg: np.ndarray  # (heights, [biases,] completed_lines, pixels)
    amplitude_v: np.ndarray
    frequency_shift_hz: np.ndarray | None
    repeat_phase_deg: np.ndarray | None  # (completed_lines, pixels): first height again at each line's end
    heights_m: np.ndarray
    biases_v: np.ndarray | None  # None: no bias grid
    completed_lines: int
    lines: int
    pixels: int
    scan_size_m: float
    line_rate_hz: float
    order: str
    repeat_first: bool
    settings_json: str

    @property
    def finished(self) -> bool:
        return self.completed_lines >= self.lines


# ---- units from name suffixes -----------------------------------------------------------------------------
_UNIT_SUFFIXES: tuple[tuple[tuple[str, ...], str], ...] = (
    (("n", "per", "m"), "N/m"), (("nm", "per", "v"), "nm/V"), (("m", "per", "v"), "m/V"),
    (("v2", "per", "hz"), "V^2/Hz"), (("m2", "per", "hz"), "m^2/Hz"), (("m", "per", "s"), "m/s"),
    (("ka", "per", "m"), "kA/m"), (("kg", "per", "m3"), "kg/m^3"), (("kg", "m3"), "kg/m^3"), (("pa", "s"), "Pa s"),
    (("a", "m2"), "A m^2"), (("per", "m"), "1/m"), (("per", "s"), "1/s"), (("hz",), "Hz"), (("m",), "m"),
    (("nm",), "nm"), (("um",), "um"), (("v",), "V"), (("v2",), "V^2"), (("deg",), "deg"), (("rad",), "rad"),
    (("s",), "s"), (("k",), "K"), (("pa",), "Pa"), (("n",), "N"), (("j",), "J"), (("px",), "pixel"),
)


def unit_for_name(name: str) -> str:
    """The unit a name's suffix states (``k_n_per_m`` -> ``"N/m"``); ``""`` (dimensionless) when none does."""
    tokens = tuple(name.lower().split("_"))
    for suffix, unit in _UNIT_SUFFIXES:
        if len(tokens) > len(suffix) and tokens[-len(suffix):] == suffix:
            return unit
    return ""


# ---- controller URL without secrets ------------------------------------------------------------------------
_SECRET_KEYS = ("key", "secret", "password", "passwd", "token", "client", "server", "auth", "cert")
_SECRET_ENDINGS = (".key", ".key_secret", ".pem", ".secret")


def redact_controller_url(url: str) -> str:
    """``url`` with user info removed and query values that name keys or secrets replaced by ``REDACTED``."""
    parts = urlsplit(url)
    netloc = parts.netloc.rsplit("@", 1)[-1]
    query = []
    for key, value in parse_qsl(parts.query, keep_blank_values=True):
        looks_secret = any(s in key.lower() for s in _SECRET_KEYS) or value.lower().endswith(_SECRET_ENDINGS) \
            or "secret" in value.lower()
        query.append((key, "REDACTED" if looks_secret and value else value))
    text = f"{parts.scheme}://{netloc}{parts.path}" if "://" in url else urlunsplit(
        (parts.scheme, netloc, parts.path, "", ""))
    return text + (f"?{urlencode(query, safe='/:.-_~')}" if query else "")


BeforeWrite = Callable[[int], None]
Scalar = float | int | str | bool
_MAX_ATTR_TEXT = 48_000  # attributes in the default format live in the object header (64 KiB limit)


_RESERVED = frozenset({"NX_class", "scalar_units", "signal", "axes", "default", "auxiliary_signals"})


def _plain_scalars(scalars: Mapping[str, Scalar]) -> dict[str, Scalar]:
    out: dict[str, Scalar] = {}
    for name, value in scalars.items():
        if not isinstance(name, str) or not name or name in _RESERVED:
            raise SessionFileError(f"scalar name {name!r} is empty, not a string or reserved ({sorted(_RESERVED)})")
        if isinstance(value, (bool, np.bool_)):
            out[name] = bool(value)
        elif isinstance(value, str):
            out[name] = value
        elif isinstance(value, (int, np.integer)):
            out[name] = int(value)
        elif isinstance(value, (float, np.floating)):
            out[name] = float(value)
        else:
            raise SessionFileError(f"scalar {name!r} must be a float, int, str or bool, got {type(value).__name__}")
    return out


def _plain_arrays(arrays: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    out = {}
    for name, values in arrays.items():
        _check_name(name)
        data = np.asarray(values)
        if data.dtype.kind not in "fiub":
            raise SessionFileError(f"array {name!r} must be numeric, got dtype {data.dtype}")
        out[name] = data.astype(np.float64, copy=False) if data.dtype.kind == "f" else data
    return out


def _read_record(group: h5py.Group) -> Record:
    units = json.loads(group.attrs.get("scalar_units", "{}"))
    scalars: dict[str, Scalar] = {}
    for name, value in group.attrs.items():
        if name in _RESERVED or name.endswith("_indices"):
            continue
        if isinstance(value, bytes):
            value = value.decode()
        elif isinstance(value, np.generic):
            value = value.item()
        scalars[name] = value
    arrays: dict[str, np.ndarray] = {}
    for name, item in group.items():
        if isinstance(item, h5py.Dataset):
            arrays[name] = item[()]
            units[name] = str(item.attrs.get("units", ""))
    return Record(path=group.name.lstrip("/"), scalars=scalars, arrays=arrays, units=units)


class SeriesWriter:
    """Writes the lines of one lift-height series, in order, flushing after each line."""

    def __init__(self, session: "SessionFile", group: h5py.Group, *, before_write: BeforeWrite | None) -> None:
        self._session = session
        self._group = group
        self._before_write = before_write
        self.name: str = group.name.rsplit("/", 1)[-1]
        self.lines: int = int(group.attrs["lines"])
        self.pixels: int = int(group.attrs["pixels"])
        self.settings_json: str = str(group.attrs["settings_json"])
        self._pass_shape: tuple[int, ...] = group["phase_deg"].shape[:-2] + (self.pixels,)
        self._has_fshift = "frequency_shift_hz" in group
        self._has_repeat = "repeat_phase_deg" in group
        # opened once: looking a dataset up by name costs about as much as writing one line of it
        self._datasets = {name: group[name] for name in ("topography_m", "phase_deg", "amplitude_v",
                                                         "frequency_shift_hz", "repeat_phase_deg") if name in group}

    @property
    def completed_lines(self) -> int:
        return int(self._group.attrs["completed_lines"])

    def write_line(self, index: int, *, topography_m: np.ndarray, phase_deg: np.ndarray, amplitude_v: np.ndarray,
                   frequency_shift_hz: np.ndarray | None = None, repeat_phase_deg: np.ndarray | None = None) -> None:
        """Write scan line ``index`` (must be the next one), bump ``completed_lines`` and flush.

        ``phase_deg`` and ``amplitude_v`` have shape (heights, pixels) or (heights, biases, pixels).
        An OSError (a full disk, or one raised by ``before_write``) leaves every earlier line readable.
        """
        done = self.completed_lines
        if index != done:
            raise SessionFileError(f"series {self.name!r}: line index {index} is not the next line ({done})")
        if index >= self.lines:
            raise FinishedSeriesError(f"series {self.name!r}: line index {index} beyond the {self.lines} lines")
        topo = self._check("topography_m", topography_m, (self.pixels,))
        phase = self._check("phase_deg", phase_deg, self._pass_shape)
        amp = self._check("amplitude_v", amplitude_v, self._pass_shape)
        # a controller may report frequency shift without the series having declared it: keep it, do not fail
        fshift = self._optional("frequency_shift_hz", frequency_shift_hz, self._has_fshift or
                                frequency_shift_hz is not None, self._pass_shape)
        repeat = self._optional("repeat_phase_deg", repeat_phase_deg, self._has_repeat, (self.pixels,))
        self._session._check_usable()
        if self._before_write is not None:
            self._before_write(index)
        g, ds = self._group, self._datasets
        try:
            if fshift is not None and not self._has_fshift:
                _line_dataset(g, "frequency_shift_hz", ds["phase_deg"].shape)
                g.attrs["auxiliary_signals"] = ["amplitude_v", "frequency_shift_hz"]
                ds["frequency_shift_hz"] = g["frequency_shift_hz"]
                self._has_fshift = True
            ds["topography_m"][index, :] = topo
            ds["phase_deg"][..., index, :] = phase
            ds["amplitude_v"][..., index, :] = amp
            if fshift is not None:
                ds["frequency_shift_hz"][..., index, :] = fshift
            if repeat is not None:
                ds["repeat_phase_deg"][index, :] = repeat
            # the counter goes last: a kill before the flush below leaves the old count, the new line ignored
            g.attrs.modify("completed_lines", np.int64(index + 1))
            self._session.flush()
        except (OSError, ValueError, RuntimeError) as exc:  # h5py reports a full disk as any of these
            raise self._session._failed(f"line {index} of series {self.name!r}", exc) from exc

    def _check(self, name: str, values: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
        data = np.asarray(values, dtype=np.float64)
        if data.shape != shape:
            raise SessionFileError(f"series {self.name!r}: {name} has shape {data.shape}, expected {shape}")
        return data

    def _optional(self, name: str, values: np.ndarray | None, declared: bool,
                  shape: tuple[int, ...]) -> np.ndarray | None:
        if declared and values is None:
            raise SessionFileError(f"series {self.name!r}: {name} was declared for this series but not given")
        if not declared and values is not None:
            raise SessionFileError(f"series {self.name!r}: {name} given but the series was created without it")
        return None if values is None else self._check(name, values, shape)


class SessionFile:
    """An open session file. Create with :meth:`create`, reopen with :meth:`open`; use as a context manager."""

    def __init__(self, h5: h5py.File, *, fsync: bool) -> None:
        self._h5 = h5
        self._fsync = fsync
        self._broken: str | None = None  # set by a failed write: the HDF5 state is no longer trustworthy
        self.path = Path(h5.filename)

    # ---- opening -------------------------------------------------------------------------------------
    @classmethod
    def create(cls, path: str | os.PathLike[str], *, controller_url: str, scenario_text: str | None = None,
               software_version: str, fsync: bool = False, now: datetime | None = None) -> "SessionFile":
        """Create a new session file; refuses to overwrite an existing file."""
        path = Path(path)
        if path.exists():
            raise UnwritablePathError(f"session file {str(path)!r} already exists; choose a new name")
        if scenario_text is not None and len(scenario_text.encode()) > _MAX_ATTR_TEXT:
            raise SessionFileError(f"scenario text is {len(scenario_text.encode())} bytes; limit {_MAX_ATTR_TEXT}")
        try:
            h5 = h5py.File(path, "w-")
        except OSError as exc:
            raise UnwritablePathError(f"cannot create session file {str(path)!r}: {exc}") from exc
        created = (now or datetime.now(timezone.utc)).astimezone(timezone.utc)
        attrs = h5.attrs
        attrs["format"] = FORMAT_NAME
        attrs["format_version"] = np.int64(FORMAT_VERSION)
        attrs["software_version"] = software_version
        attrs["created_utc"] = created.isoformat(timespec="seconds").replace("+00:00", "Z")
        attrs["controller_url"] = redact_controller_url(controller_url)
        if scenario_text is not None:
            attrs["scenario_text"] = scenario_text
        attrs["complete"] = False
        attrs["NX_class"] = "NXroot"
        session = cls(h5, fsync=fsync)
        session.flush()
        if fsync and hasattr(os, "O_DIRECTORY"):  # a power cut must not lose the new file's directory entry
            folder = os.open(path.resolve().parent, os.O_RDONLY | os.O_DIRECTORY)
            try:
                os.fsync(folder)
            finally:
                os.close(folder)
        return session

    @classmethod
    def open(cls, path: str | os.PathLike[str], mode: Literal["r", "a"] = "r", *,
             fsync: bool = False) -> "SessionFile":
        """Open an existing session file for reading (``"r"``) or to add to it (``"a"``)."""
        if mode not in ("r", "a"):
            raise SessionFileError(f"mode must be 'r' or 'a', got {mode!r}")
        path = Path(path)
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
        return cls(h5, fsync=fsync)

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

    def _check_usable(self) -> None:
        if self._broken is not None:
            raise SessionWriteError(f"an earlier write to {str(self.path)!r} failed ({self._broken}); "
                                    "close the file and reopen it with mode 'a' to resume")

    def _failed(self, what: str, exc: BaseException) -> SessionWriteError:
        self._broken = f"{what}: {exc}".splitlines()[0]
        errno = exc.errno if isinstance(exc, OSError) else None
        return SessionWriteError(errno, f"writing {what} to {str(self.path)!r} failed: {self._broken}; "
                                        "every line counted in completed_lines before it is intact")

    @contextmanager
    def _writing(self, what: str) -> Iterator[None]:
        self._check_usable()
        try:
            yield
            self.flush()
        except SessionFileError:
            raise
        except (OSError, ValueError, RuntimeError) as exc:  # h5py reports a full disk as any of these
            raise self._failed(what, exc) from exc

    # ---- writing records -----------------------------------------------------------------------------
    def write_calibration(self, scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None = None, *,
                          plot: tuple[str, str] | None = None) -> str:
        """Add a probe calibration as ``probe/<n>``; returns that path.

        Scalar and array names carry their unit as a suffix (``k_n_per_m``, ``psd_v2_per_hz``).
        ``plot=(signal, axis)`` names the array to show first in a viewer and its axis array.
        """
        record = self._checked(scalars, arrays, plot)
        with self._writing("a calibration"):
            parent = self._h5.require_group("probe")
            parent.attrs["NX_class"] = "NXcollection"
            group = parent.create_group(str(len(parent)))
            self._fill(group, *record)
        return group.name.lstrip("/")

    def write_resonance(self, scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None = None, *,
                        plot: tuple[str, str] | None = None) -> None:
        """Store the resonance sweep and its fit as ``resonance/`` (replacing an earlier one)."""
        record = self._checked(scalars, arrays, plot)
        with self._writing("the resonance"):
            self._fill(self._fresh_group("resonance"), *record)

    def write_approach(self, scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None = None, *,
                       plot: tuple[str, str] | None = None) -> None:
        """Store the approach trace and result as ``approach/`` (replacing an earlier one)."""
        record = self._checked(scalars, arrays, plot)
        with self._writing("the approach"):
            self._fill(self._fresh_group("approach"), *record)

    def write_analysis(self, name: str, scalars: Mapping[str, Scalar],
                       arrays: Mapping[str, np.ndarray] | None = None) -> None:
        """Store decomposition results as ``analysis/<name>/`` (replacing earlier results of that name)."""
        _check_name(name)
        record = self._checked(scalars, arrays, None)
        with self._writing(f"analysis {name!r}"):
            parent = self._h5.require_group("analysis")
            parent.attrs["NX_class"] = "NXcollection"
            if name in parent:
                del parent[name]
            self._fill(parent.create_group(name), *record)

    def write_run_plan(self, plan_json: str) -> None:
        """Keep what the run was asked to do (JSON: series and calibration settings) as the root attribute
        ``run_plan_json``, so that a run stopped before its series began can still be resumed."""
        try:
            json.loads(plan_json)
        except (TypeError, ValueError) as exc:
            raise SessionFileError(f"run plan is not valid JSON: {exc}") from exc
        if len(plan_json.encode()) > _MAX_ATTR_TEXT:
            raise SessionFileError(f"run plan is {len(plan_json.encode())} bytes; limit {_MAX_ATTR_TEXT}")
        with self._writing("the run plan"):
            self._h5.attrs["run_plan_json"] = plan_json

    def read_run_plan(self) -> str | None:
        """The run plan written by :meth:`write_run_plan`, or None."""
        value = self._h5.attrs.get("run_plan_json")
        return None if value is None else str(value)

    def mark_complete(self) -> None:
        """Mark the session as finished normally."""
        with self._writing("the complete flag"):
            self._h5.attrs["complete"] = True

    def _fresh_group(self, name: str) -> h5py.Group:
        if name in self._h5:
            del self._h5[name]
        return self._h5.create_group(name)

    @staticmethod
    def _checked(scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None,
                 plot: tuple[str, str] | None) -> tuple[dict[str, Scalar], dict[str, np.ndarray], tuple | None]:
        """Validate everything before the file is touched, so a bad argument leaves no half-written group."""
        plain_scalars, plain_arrays = _plain_scalars(scalars), _plain_arrays(arrays or {})
        for part in plot or ():
            if part not in plain_arrays:
                raise SessionFileError(f"plot names {part!r}, which is not among the arrays {sorted(plain_arrays)}")
        return plain_scalars, plain_arrays, plot

    @staticmethod
    def _fill(group: h5py.Group, scalars: dict[str, Scalar], arrays: dict[str, np.ndarray],
              plot: tuple[str, str] | None) -> None:
        group.attrs.update(scalars)
        units = {k: unit_for_name(k) for k, v in scalars.items() if not isinstance(v, (str, bool))}
        group.attrs["scalar_units"] = json.dumps(units, sort_keys=True)
        for name, data in arrays.items():
            group.create_dataset(name, data=data, dtype=data.dtype).attrs["units"] = unit_for_name(name)
        group.attrs["NX_class"] = "NXcollection" if plot is None else "NXdata"
        if plot is not None:
            group.attrs["signal"] = plot[0]
            group.attrs["axes"] = [plot[1]]

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
        _check_name(name)
        heights = np.asarray(heights_m, dtype=np.float64)
        if heights.ndim != 1 or heights.size == 0 or not np.all(np.isfinite(heights)):
            raise SessionFileError(f"heights_m must be a non-empty 1-D array of finite values, got {heights_m!r}")
        for label, value in (("lines", lines), ("pixels", pixels)):
            if int(value) != value or value < 1:
                raise SessionFileError(f"{label} must be a positive integer, got {value!r}")
        for label, value in (("scan_size_m", scan_size_m), ("line_rate_hz", line_rate_hz)):
            if not (np.isfinite(value) and value > 0):
                raise SessionFileError(f"{label} must be positive and finite, got {value!r}")
        try:
            json.loads(settings_json)
        except (TypeError, ValueError) as exc:
            raise SessionFileError(f"settings_json is not valid JSON: {exc}") from exc
        biases = None if biases_v is None or len(biases_v) == 0 else np.asarray(biases_v, dtype=np.float64)
        if biases is not None and (biases.ndim != 1 or not np.all(np.isfinite(biases))):
            raise SessionFileError(f"biases_v must be a 1-D sequence of finite values or None, got {biases_v!r}")
        if name in self.series_names():
            raise SessionFileError(f"series {name!r} already exists in {str(self.path)!r}; resume it instead")
        with self._writing(f"series {name!r}"):
            g = self._new_series_group(name, heights, biases, lines=int(lines), pixels=int(pixels),
                                       scan_size_m=float(scan_size_m), line_rate_hz=float(line_rate_hz),
                                       order=order, repeat_first=repeat_first, settings_json=settings_json,
                                       frequency_shift=frequency_shift)
        return SeriesWriter(self, g, before_write=before_write)

    def _new_series_group(self, name: str, heights: np.ndarray, biases: np.ndarray | None, *, lines: int,
                          pixels: int, scan_size_m: float, line_rate_hz: float, order: str, repeat_first: bool,
                          settings_json: str, frequency_shift: bool) -> h5py.Group:
        series_root = self._h5.require_group("series")
        g = series_root.create_group(name)
        lead = (heights.size,) if biases is None else (heights.size, biases.size)
        pass_names = ["phase_deg", "amplitude_v"] + (["frequency_shift_hz"] if frequency_shift else [])
        for ds_name in pass_names:
            _line_dataset(g, ds_name, lead + (lines, pixels))
        _line_dataset(g, "topography_m", (lines, pixels))
        if repeat_first:
            _line_dataset(g, "repeat_phase_deg", (lines, pixels))
        _axis(g, "lift_height_m", heights, "m")
        if biases is not None:
            _axis(g, "tip_bias_v", biases, "V")
        _axis(g, "y_m", np.arange(lines) * (scan_size_m / lines), "m")
        _axis(g, "x_m", np.arange(pixels) * (scan_size_m / pixels), "m")
        axes = ["lift_height_m"] + (["tip_bias_v"] if biases is not None else []) + ["y_m", "x_m"]
        g.attrs.update({
            "NX_class": "NXdata", "signal": "phase_deg", "axes": axes,
            "auxiliary_signals": [n for n in pass_names if n != "phase_deg"],
            "heights_nm": heights * 1e9, "bias_v": np.array([] if biases is None else biases, dtype=np.float64),
            "completed_lines": np.int64(0), "lines": np.int64(lines), "pixels": np.int64(pixels),
            "scan_size_m": float(scan_size_m), "line_rate_hz": float(line_rate_hz), "order": order,
            "repeat_first": bool(repeat_first), "settings_json": settings_json,
        })
        for i, axis in enumerate(axes):
            g.attrs[f"{axis}_indices"] = np.int64(i)
        topo_view = g.create_group("topography")
        topo_view.attrs.update({"NX_class": "NXdata", "signal": "topography_m", "axes": ["y_m", "x_m"]})
        for linked in ("topography_m", "y_m", "x_m"):
            topo_view[linked] = g[linked]  # hard links: no copy, no extra writes per line
        series_root.attrs["NX_class"] = "NXentry"
        series_root.attrs["default"] = name
        self._h5.attrs["default"] = "series"
        return g

    def open_series_for_resume(self, name: str, *, before_write: BeforeWrite | None = None) -> SeriesWriter:
        """A writer that continues ``series/<name>`` at its next line; refuses a finished series."""
        g = self._series_group(name)
        done, lines = int(g.attrs["completed_lines"]), int(g.attrs["lines"])
        if done >= lines:
            raise FinishedSeriesError(f"series {name!r} is finished ({done} of {lines} lines); nothing to resume")
        if bool(self._h5.attrs.get("complete", False)):
            with self._writing("the complete flag"):
                self._h5.attrs["complete"] = False
        return SeriesWriter(self, g, before_write=before_write)

    # ---- reading -------------------------------------------------------------------------------------
    def info(self) -> SessionInfo:
        a = self._h5.attrs
        scenario = a.get("scenario_text")
        return SessionInfo(format=str(a["format"]), format_version=int(a["format_version"]),
                           software_version=str(a["software_version"]), created_utc=str(a["created_utc"]),
                           controller_url=str(a["controller_url"]),
                           scenario_text=None if scenario is None else str(scenario),
                           complete=bool(a["complete"]))

    def series_names(self) -> list[str]:
        return sorted(self._h5["series"]) if "series" in self._h5 else []

    def read_series(self, name: str) -> SeriesData:
        """Arrays and attributes of ``series/<name>``, holding only the completed lines."""
        g = self._series_group(name)
        n = int(g.attrs["completed_lines"])
        biases = np.asarray(g.attrs["bias_v"], dtype=np.float64)
        optional = {k: (g[k][..., :n, :] if k in g else None) for k in ("frequency_shift_hz", "repeat_phase_deg")}
        return SeriesData(
            name=name, topography_m=g["topography_m"][:n, :], phase_deg=g["phase_deg"][..., :n, :],
            amplitude_v=g["amplitude_v"][..., :n, :], frequency_shift_hz=optional["frequency_shift_hz"],
            repeat_phase_deg=optional["repeat_phase_deg"], heights_m=g["lift_height_m"][()],
            biases_v=g["tip_bias_v"][()] if "tip_bias_v" in g else (biases if biases.size else None),
            completed_lines=n, lines=int(g.attrs["lines"]), pixels=int(g.attrs["pixels"]),
            scan_size_m=float(g.attrs["scan_size_m"]), line_rate_hz=float(g.attrs["line_rate_hz"]),
            order=str(g.attrs["order"]), repeat_first=bool(g.attrs["repeat_first"]),
            settings_json=str(g.attrs["settings_json"]))

    def read_calibrations(self) -> list[Record]:
        """Every ``probe/<n>`` record, oldest first."""
        if "probe" not in self._h5:
            return []
        parent = self._h5["probe"]
        return [_read_record(parent[k]) for k in sorted(parent, key=int)]

    def read_resonance(self) -> Record | None:
        return _read_record(self._h5["resonance"]) if "resonance" in self._h5 else None

    def read_approach(self) -> Record | None:
        return _read_record(self._h5["approach"]) if "approach" in self._h5 else None

    def analysis_names(self) -> list[str]:
        return sorted(self._h5["analysis"]) if "analysis" in self._h5 else []

    def read_analysis(self, name: str) -> Record:
        if name not in self.analysis_names():
            raise SessionFileError(f"no analysis {name!r} in {str(self.path)!r}; have {self.analysis_names()}")
        return _read_record(self._h5["analysis"][name])

    def _series_group(self, name: str) -> h5py.Group:
        if name not in self.series_names():
            raise SessionFileError(f"no series {name!r} in {str(self.path)!r}; have {self.series_names()}")
        return self._h5["series"][name]


def _check_name(name: str) -> None:
    if not name or "/" in name or name.startswith(".") or name != name.strip():
        raise SessionFileError(f"name {name!r} must be non-empty, without '/', leading dot or spaces at the ends")


def _line_dataset(group: h5py.Group, name: str, shape: tuple[int, ...]) -> None:
    # one chunk holds one scan line of every height/bias; all chunks allocated now (see module docstring)
    dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    dcpl.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)
    chunks = shape[:-2] + (1, shape[-1])
    ds = group.create_dataset(name, shape=shape, dtype=np.float64, chunks=chunks, fillvalue=np.nan, dcpl=dcpl)
    ds.attrs["units"] = unit_for_name(name)


def _axis(group: h5py.Group, name: str, values: np.ndarray, units: str) -> None:
    ds = group.create_dataset(name, data=np.asarray(values, dtype=np.float64), dtype=np.float64)
    ds.attrs["units"] = units
