"""What a session file is made of, apart from the file itself: its format, its errors, the records it stores
(scalars with units from their names, arrays) and how a controller URL is kept without secrets."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from urllib.parse import parse_qsl, urlencode, urlsplit, urlunsplit

import h5py
import numpy as np

from assistant.errors import AssistantError

FORMAT_NAME = "mfm-assistant-session"
FORMAT_VERSION = 1


# ---- errors ---------------------------------------------------------------------------------------------
class SessionFileError(AssistantError, ValueError):
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


class SessionWriteError(AssistantError, OSError):
    """Writing to the file failed (typically a full disk). Every line counted in ``completed_lines`` before
    the failure stays readable; close the file (further writes are refused) and reopen it to resume."""


# ---- what is read back ----------------------------------------------------------------------------------
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
    run_plan_json: str | None = None  # what mfma run was asked to do, kept before anything moved


@dataclass(frozen=True)
class Record:
    """A stored group (calibration, resonance, approach, analysis): scalars, arrays, and the unit of each."""

    path: str
    scalars: dict[str, float | int | str | bool]
    arrays: dict[str, np.ndarray]
    units: dict[str, str]


# ---- units from name suffixes -----------------------------------------------------------------------------
_UNIT_SUFFIXES: tuple[tuple[tuple[str, ...], str], ...] = (
    (("n", "per", "m"), "N/m"), (("nm", "per", "v"), "nm/V"), (("m", "per", "v"), "m/V"),
    (("v2", "per", "hz"), "V^2/Hz"), (("m2", "per", "hz"), "m^2/Hz"), (("m", "per", "s"), "m/s"),
    (("ka", "per", "m"), "kA/m"), (("kg", "per", "m3"), "kg/m^3"), (("kg", "m3"), "kg/m^3"), (("pa", "s"), "Pa s"),
    (("a", "m2"), "A m^2"), (("a", "per", "m"), "A/m"), (("n", "per", "a"), "N/A"), (("per", "m"), "1/m"),
    (("per", "s"), "1/s"), (("hz",), "Hz"), (("m",), "m"),
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


Scalar = float | int | str | bool
MAX_ATTR_TEXT = 48_000  # attributes in the default format live in the object header (64 KiB limit)


_RESERVED = frozenset({"NX_class", "scalar_units", "signal", "axes", "default", "auxiliary_signals"})


def plain_scalars(scalars: Mapping[str, Scalar]) -> dict[str, Scalar]:
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


def plain_arrays(arrays: Mapping[str, np.ndarray], *, keep_dtype: bool = False) -> dict[str, np.ndarray]:
    """Numeric arrays, floats as float64 unless ``keep_dtype`` (a stored result read back exactly)."""
    out = {}
    for name, values in arrays.items():
        check_name(name)
        data = np.asarray(values)
        if data.dtype.kind not in "fiub":
            raise SessionFileError(f"array {name!r} must be numeric, got dtype {data.dtype}")
        out[name] = data.astype(np.float64, copy=False) if data.dtype.kind == "f" and not keep_dtype else data
    return out


def read_record(group: h5py.Group) -> Record:
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


def check_name(name: str) -> None:
    if not name or "/" in name or name.startswith(".") or name != name.strip():
        raise SessionFileError(f"name {name!r} must be non-empty, without '/', leading dot or spaces at the ends")


def checked_record(scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray] | None,
                   plot: tuple[str, str] | None = None, *, keep_dtype: bool = False
                   ) -> tuple[dict[str, Scalar], dict[str, np.ndarray], tuple | None]:
    """Validate everything before the file is touched, so a bad argument leaves no half-written group."""
    plain_s, plain_a = plain_scalars(scalars), plain_arrays(arrays or {}, keep_dtype=keep_dtype)
    for part in plot or ():
        if part not in plain_a:
            raise SessionFileError(f"plot names {part!r}, which is not among the arrays {sorted(plain_a)}")
    return plain_s, plain_a, plot


def fill_group(group: h5py.Group, scalars: dict[str, Scalar], arrays: dict[str, np.ndarray],
               plot: tuple[str, str] | None) -> None:
    """Write a checked record into ``group``: scalars as attributes with their units, arrays as datasets."""
    group.attrs.update(scalars)
    units = {k: unit_for_name(k) for k, v in scalars.items() if not isinstance(v, (str, bool))}
    group.attrs["scalar_units"] = json.dumps(units, sort_keys=True)
    for name, data in arrays.items():
        group.create_dataset(name, data=data, dtype=data.dtype).attrs["units"] = unit_for_name(name)
    group.attrs["NX_class"] = "NXcollection" if plot is None else "NXdata"
    if plot is not None:
        group.attrs["signal"] = plot[0]
        group.attrs["axes"] = [plot[1]]
