"""A loop analysis as plain scalars and arrays, and back: the form in which a session file keeps it whole.

Every field is named by its path (``down.branch.start``, ``elements.labels``); arrays keep their dtype. Tuples of
numbers become arrays, tuples of text one text joined by newlines, and a tuple of small records (the tip's
switches) one array or text per field of the record. Fields that are None are left out.
"""

from __future__ import annotations

import dataclasses
import types
import typing

import numpy as np

__all__ = ["flatten", "build"]

_JOIN = "\n"


def flatten(obj) -> tuple[dict, dict]:
    """``(scalars, arrays)`` of a dataclass instance (see the module docstring)."""
    scalars: dict = {}
    arrays: dict = {}
    _put_fields(obj, "", scalars, arrays)
    return scalars, arrays


def build(cls, scalars: dict, arrays: dict):
    """The instance of dataclass ``cls`` that :func:`flatten` described."""
    return _build(cls, "", scalars, arrays)


def _put_fields(obj, prefix: str, scalars: dict, arrays: dict) -> None:
    for f in dataclasses.fields(obj):
        _put(prefix + f.name, getattr(obj, f.name), scalars, arrays)


def _put(name: str, value, scalars: dict, arrays: dict) -> None:
    if value is None:
        return
    if dataclasses.is_dataclass(value):
        _put_fields(value, name + ".", scalars, arrays)
    elif isinstance(value, np.ndarray):
        arrays[name] = value
    elif isinstance(value, (tuple, list)):
        items = list(value)
        if items and dataclasses.is_dataclass(items[0]):  # records: one column per field
            for f in dataclasses.fields(items[0]):
                _put(f"{name}.{f.name}", tuple(getattr(v, f.name) for v in items), scalars, arrays)
        elif items and all(isinstance(v, str) for v in items):
            scalars[name] = _JOIN.join(items)
        elif items:
            arrays[name] = np.asarray(items)
    else:
        scalars[name] = value.item() if isinstance(value, np.generic) else value


def _plain(hint):
    """``X`` of ``X | None``."""
    if typing.get_origin(hint) in (typing.Union, types.UnionType):
        return next(k for k in typing.get_args(hint) if k is not type(None))
    return hint


def _build(cls, prefix: str, scalars: dict, arrays: dict):
    hints = typing.get_type_hints(cls)
    values = {}
    for f in dataclasses.fields(cls):
        name, hint = prefix + f.name, _plain(hints[f.name])
        kind = typing.get_origin(hint) or hint
        nested = name + "."
        present = name in scalars or name in arrays or any(k.startswith(nested) for k in (*scalars, *arrays))
        if kind is tuple and present:
            values[f.name] = _tuple(name, typing.get_args(hint), scalars, arrays)
        elif kind is tuple:  # an empty tuple, or None, was not stored
            values[f.name] = f.default if f.default is not dataclasses.MISSING else ()
        elif name in arrays:
            values[f.name] = arrays[name]
        elif name in scalars:
            values[f.name] = scalars[name]
        elif dataclasses.is_dataclass(kind) and present:
            values[f.name] = _build(kind, nested, scalars, arrays)
        else:
            values[f.name] = None if f.default is dataclasses.MISSING else f.default
    return cls(**values)


def _tuple(name: str, args: tuple, scalars: dict, arrays: dict) -> tuple:
    item = args[0] if args else object
    if dataclasses.is_dataclass(item):
        hints = typing.get_type_hints(item)
        columns = {f.name: _tuple(f"{name}.{f.name}", (hints[f.name], ...), scalars, arrays)
                   for f in dataclasses.fields(item)}
        count = max((len(c) for c in columns.values()), default=0)
        return tuple(item(**{k: c[i] for k, c in columns.items()}) for i in range(count))
    if item is str:
        text = scalars.get(name)
        return tuple(str(text).split(_JOIN)) if text else ()
    return tuple(arrays[name].tolist()) if name in arrays else ()
