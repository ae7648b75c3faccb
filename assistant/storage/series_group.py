"""The series group of a session file: one lift-height series, laid out so that writing a line never changes the
file's structure, written line by line and read back cut to its completed lines.

Every dataset is chunked one scan line per chunk with all chunks allocated (and NaN-filled) when the series is
created; per line the data are written, then ``completed_lines``, then the file is flushed.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import h5py
import numpy as np

from assistant.storage.records import FinishedSeriesError, SessionFileError, check_name, unit_for_name

BeforeWrite = Callable[[int], None]


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
    resumed_at_lines: tuple[int, ...] = ()  # lines at which the series was resumed (storage.resume.RESUMED_AT)

    @property
    def finished(self) -> bool:
        return self.completed_lines >= self.lines


class SeriesWriter:
    """Writes the lines of one lift-height series, in order, flushing after each line, through its
    :class:`~assistant.storage.session_file.SessionFile` (which refuses writes after a failed one)."""

    def __init__(self, session, group: h5py.Group, *, before_write: BeforeWrite | None) -> None:
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
        self._session.check_usable()
        if self._before_write is not None:
            self._before_write(index)
        g, ds = self._group, self._datasets
        try:
            if fshift is not None and not self._has_fshift:
                line_dataset(g, "frequency_shift_hz", ds["phase_deg"].shape)
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
            raise self._session.failed(f"line {index} of series {self.name!r}", exc) from exc

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


def line_dataset(group: h5py.Group, name: str, shape: tuple[int, ...]) -> None:
    # one chunk holds one scan line of every height/bias; all chunks allocated now (see module docstring)
    dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    dcpl.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)
    chunks = shape[:-2] + (1, shape[-1])
    ds = group.create_dataset(name, shape=shape, dtype=np.float64, chunks=chunks, fillvalue=np.nan, dcpl=dcpl)
    ds.attrs["units"] = unit_for_name(name)


def axis_dataset(group: h5py.Group, name: str, values: np.ndarray, units: str) -> None:
    ds = group.create_dataset(name, data=np.asarray(values, dtype=np.float64), dtype=np.float64)
    ds.attrs["units"] = units


def checked_scan_arguments(name: str, values: Sequence[float], label: str, *, lines: int, pixels: int,
                           scan_size_m: float, line_rate_hz: float, settings_json: str) -> np.ndarray:
    """The per-step values of a new series (lift heights, or fields) as an array, after checking every argument
    both kinds of series share, so that a bad one leaves the file untouched; ``label`` names the values."""
    check_name(name)
    array = np.asarray(values, dtype=np.float64)
    if array.ndim != 1 or array.size == 0 or not np.all(np.isfinite(array)):
        raise SessionFileError(f"{label} must be a non-empty 1-D array of finite values, got {values!r}")
    for what, value in (("lines", lines), ("pixels", pixels)):
        if int(value) != value or value < 1:
            raise SessionFileError(f"{what} must be a positive integer, got {value!r}")
    for what, value in (("scan_size_m", scan_size_m), ("line_rate_hz", line_rate_hz)):
        if not (np.isfinite(value) and value > 0):
            raise SessionFileError(f"{what} must be positive and finite, got {value!r}")
    try:
        json.loads(settings_json)
    except (TypeError, ValueError) as exc:
        raise SessionFileError(f"settings_json is not valid JSON: {exc}") from exc
    return array


def checked_series_arguments(name: str, heights_m: Sequence[float], biases_v: Sequence[float] | None, *,
                             lines: int, pixels: int, scan_size_m: float, line_rate_hz: float,
                             settings_json: str) -> tuple[np.ndarray, np.ndarray | None]:
    """Heights and biases as arrays (biases None without a grid) after checking every argument of a new series, so
    that a bad one leaves the file untouched."""
    heights = checked_scan_arguments(name, heights_m, "heights_m", lines=lines, pixels=pixels,
                                     scan_size_m=scan_size_m, line_rate_hz=line_rate_hz, settings_json=settings_json)
    biases = None if biases_v is None or len(biases_v) == 0 else np.asarray(biases_v, dtype=np.float64)
    if biases is not None and (biases.ndim != 1 or not np.all(np.isfinite(biases))):
        raise SessionFileError(f"biases_v must be a 1-D sequence of finite values or None, got {biases_v!r}")
    return heights, biases


def new_series_group(root: h5py.Group, name: str, heights: np.ndarray, biases: np.ndarray | None, *, lines: int,
                     pixels: int, scan_size_m: float, line_rate_hz: float, order: str, repeat_first: bool,
                     settings_json: str, frequency_shift: bool) -> h5py.Group:
    """Create ``series/<name>`` under ``root``, every dataset allocated and NaN-filled, with its NeXus view."""
    series_root = root.require_group("series")
    g = series_root.create_group(name)
    lead = (heights.size,) if biases is None else (heights.size, biases.size)
    pass_names = ["phase_deg", "amplitude_v"] + (["frequency_shift_hz"] if frequency_shift else [])
    for ds_name in pass_names:
        line_dataset(g, ds_name, lead + (lines, pixels))
    line_dataset(g, "topography_m", (lines, pixels))
    if repeat_first:
        line_dataset(g, "repeat_phase_deg", (lines, pixels))
    axis_dataset(g, "lift_height_m", heights, "m")
    if biases is not None:
        axis_dataset(g, "tip_bias_v", biases, "V")
    axis_dataset(g, "y_m", np.arange(lines) * (scan_size_m / lines), "m")
    axis_dataset(g, "x_m", np.arange(pixels) * (scan_size_m / pixels), "m")
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
    root.attrs["default"] = "series"
    return g


def read_series(g: h5py.Group, name: str) -> SeriesData:
    """Arrays and attributes of the series group ``g`` (named ``name``), cut to its completed lines."""
    from assistant.storage.resume import resumed_at

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
        settings_json=str(g.attrs["settings_json"]), resumed_at_lines=resumed_at(g))
