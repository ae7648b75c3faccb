"""The server's gate: the decoded arguments of a command checked against its kinds and the instrument's hard
limits (both codecs deliver Python values; these checks run on them)."""

from __future__ import annotations

import math
from typing import Any

from drivers.base import Limits
from drivers.errors import LimitExceeded
from drivers.wire.scpi import NAME, WireError

__all__ = ["MAX_LIST", "check_types", "check_value", "check_limits", "within"]

MAX_LIST = 4096  # values in any list argument (a protocol bound, common practice, no source)


def check_types(cmd, args: tuple) -> tuple:
    """Validate decoded argument values against the command's kinds; returns them normalised.

    Raises :class:`WireError`: -109 missing, -108 too many, -104 wrong type.
    """
    if not isinstance(args, tuple):
        raise WireError(-104, "arguments must be a sequence")
    if len(args) < len(cmd.params):
        raise WireError(-109, f"{cmd.spelling} needs {', '.join(p.name for p in cmd.params)}")
    if len(args) > len(cmd.params):
        raise WireError(-108, f"{cmd.spelling} takes {len(cmd.params)} parameters, got {len(args)}")
    return tuple(check_value(p.kind, v, p.name) for p, v in zip(cmd.params, args))


def check_value(kind: str, v: Any, name: str) -> Any:
    if kind.endswith("*"):
        if not isinstance(v, (tuple, list)):
            raise WireError(-104, f"{name} must be a list")
        if len(v) > MAX_LIST:
            raise WireError(-223, f"{name} has {len(v)} values, more than {MAX_LIST}")
        return tuple(check_value(kind[:-2], x, name) for x in v)
    if kind == "float":
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise WireError(-104, f"{name} must be a number")
        return float(v)
    if kind == "opt_float":
        return None if v is None else check_value("float", v, name)
    if kind == "int":
        if isinstance(v, bool) or not isinstance(v, int):
            raise WireError(-104, f"{name} must be an integer")
        return int(v)
    if kind == "bool":
        if not isinstance(v, bool):
            raise WireError(-104, f"{name} must be a boolean")
        return v
    if kind == "name":
        if not isinstance(v, str) or not NAME.match(v):
            raise WireError(-104, f"{name} must be a name of letters, digits and _")
        return v
    if kind in ("str", "text"):
        if not isinstance(v, str) or len(v) > 1024 or any(not 32 <= ord(c) < 127 for c in v):
            raise WireError(-104, f"{name} must be printable ASCII text of at most 1024 characters")
        return v
    raise WireError(-104, f"{name}: unknown kind {kind}")


def check_limits(cmd, args: tuple, limits: Limits) -> None:
    """Refuse anything outside the hard limits (NaN and infinities included): raises LimitExceeded."""
    for p, v in zip(cmd.params, args):
        if p.bounds is not None and v is not None:
            low, high = p.bounds(limits)
            within(p.name, v, low, high, p.unit)
        elif p.kind in ("float", "opt_float") and v is not None and not math.isfinite(v):
            raise LimitExceeded(p.name, v, None, None, p.unit)
    if cmd.check is not None:
        cmd.check(limits, args)


def within(name: str, v: float, low: float | None, high: float | None, unit: str) -> None:
    """Raise :class:`LimitExceeded` unless ``low <= v <= high`` (None: unbounded on that side) and v is finite."""
    ok = math.isfinite(v) and (low is None or v >= low) and (high is None or v <= high)
    if not ok:
        raise LimitExceeded(name, v, low, high, unit)
