"""Hypothesis strategies for the wire tests: typed values for every kind of the command table."""

from __future__ import annotations

import math

import numpy as np
from hypothesis import strategies as st

from drivers.wire.commands import COMMANDS, Command

PRINTABLE = st.characters(min_codepoint=32, max_codepoint=126)

SCALARS = {
    "float": st.floats(allow_nan=True, allow_infinity=True),
    "int": st.integers(-(2**40), 2**40),
    "bool": st.booleans(),
    "opt_float": st.none() | st.floats(allow_nan=True, allow_infinity=True),
    "name": st.builds(lambda a, b: a + b, st.sampled_from("abcXYZ_"),
                      st.text(st.sampled_from("abcdefXYZ0123456789_"), max_size=20)),
    "str": st.text(PRINTABLE, max_size=40),
    "text": st.text(st.sampled_from("abcXYZ019 ._-"), max_size=20).map(lambda t: f"a{t}z"),
}


def value(kind: str):
    if kind in ("f32[]", "f64[]"):
        dtype = np.float32 if kind == "f32[]" else np.float64
        return st.lists(st.floats(width=32 if kind == "f32[]" else 64, allow_nan=True, allow_infinity=True),
                        max_size=40).map(lambda v: np.array(v, dtype=dtype))
    if kind.endswith("*"):
        return st.lists(SCALARS[kind[:-2]], max_size=12).map(tuple)
    return SCALARS[kind]


def args_for(kinds) -> st.SearchStrategy[tuple]:
    return st.tuples(*(value(k) for k in kinds))


def command_with_args() -> st.SearchStrategy[tuple[Command, tuple]]:
    return st.sampled_from(COMMANDS).flatmap(
        lambda cmd: st.tuples(st.just(cmd), args_for(tuple(p.kind for p in cmd.params))))


def command_with_reply() -> st.SearchStrategy[tuple[Command, tuple]]:
    return st.sampled_from(COMMANDS).flatmap(lambda cmd: st.tuples(st.just(cmd), args_for(cmd.reply)))


def same(a, b) -> bool:
    """Equality that treats NaN as equal to NaN and compares arrays element-wise (value and sign of zero)."""
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        a, b = np.asarray(a, float), np.asarray(b, float)
        return a.shape == b.shape and bool(np.all((a == b) | (np.isnan(a) & np.isnan(b))))
    if isinstance(a, tuple) and isinstance(b, tuple):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
    if isinstance(a, float) and isinstance(b, float):
        return (math.isnan(a) and math.isnan(b)) or (a == b and math.copysign(1, a) == math.copysign(1, b))
    return type(a) is type(b) and a == b
