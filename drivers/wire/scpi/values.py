"""Typed values of the command kinds (``drivers.wire.commands``) to and from SCPI tokens, for requests and
answers."""

from __future__ import annotations

import numpy as np

from drivers.wire.scpi.lines import (WireError, format_float, format_string, parse_bool, parse_float, parse_int,
                                     parse_name, parse_string)
from drivers.wire.scpi.replies import Token, decode_block, encode_block

_SCALAR_PARSERS = {"float": parse_float, "int": parse_int, "bool": parse_bool, "name": parse_name,
                   "str": parse_string}


def _format_scalar(kind: str, v: object) -> str:
    if kind == "float":
        return format_float(v)  # type: ignore[arg-type]
    if kind == "opt_float":
        return "DEF" if v is None else format_float(v)  # type: ignore[arg-type]
    if kind == "int":
        return str(int(v))  # type: ignore[call-overload]
    if kind == "bool":
        return "1" if v else "0"
    if kind == "name":
        return parse_name(str(v))
    if kind == "str":
        return format_string(str(v))
    if kind == "text":
        text = str(v)
        if any(c in text for c in ',;"') or any(not 32 <= ord(c) < 127 for c in text) or not text.strip():
            raise WireError(-101, "an unquoted text field must be printable and free of , ; and quotes")
        return text.strip()
    raise WireError(-104, f"unknown kind {kind}")


def encode_params(kinds: tuple[str, ...], args: tuple) -> tuple[str, ...]:
    """Request parameters as tokens; a trailing list kind spreads its values."""
    out: list[str] = []
    for kind, v in zip(kinds, args):
        if kind.endswith("*"):
            out.extend(_format_scalar(kind[:-2], x) for x in v)
        else:
            out.append(_format_scalar(kind, v))
    return tuple(out)


def _parse_scalar(kind: str, token: str) -> object:
    if kind == "opt_float":
        return None if token.upper() in ("DEF", "DEFAULT") else parse_float(token)
    return _SCALAR_PARSERS[kind](token)


def decode_params(kinds: tuple[str, ...], tokens: tuple[str, ...]) -> tuple:
    """Typed arguments from request tokens: -109 too few, -108 too many, -104 wrong type."""
    rest = bool(kinds) and kinds[-1].endswith("*")
    fixed = kinds[:-1] if rest else kinds
    if len(tokens) < len(fixed):
        raise WireError(-109, f"expected {len(fixed)} parameters, got {len(tokens)}")
    if not rest and len(tokens) > len(fixed):
        raise WireError(-108, f"expected {len(fixed)} parameters, got {len(tokens)}")
    args = [_parse_scalar(k, t) for k, t in zip(fixed, tokens)]
    if rest:
        args.append(tuple(_parse_scalar(kinds[-1][:-2], t) for t in tokens[len(fixed):]))
    return tuple(args)


def encode_answer(kinds: tuple[str, ...], fields: tuple) -> bytes:
    """One query's answer: comma-separated fields, arrays as blocks (``f32[]`` / ``f64[]``)."""
    parts: list[bytes] = []
    for kind, v in zip(kinds, fields, strict=True):
        if kind in ("f32[]", "f64[]"):
            parts.append(encode_block(np.asarray(v), "<f4" if kind == "f32[]" else "<f8"))
        elif kind.endswith("*"):
            parts.extend(_format_scalar(kind[:-2], x).encode("ascii") for x in v)
        else:
            parts.append(_format_scalar(kind, v).encode("ascii"))
    return b",".join(parts) if parts else b""


def decode_answer(kinds: tuple[str, ...], tokens: list[Token]) -> tuple:
    """Typed fields of one answer; any mismatch of count or type raises :class:`WireError`."""
    rest = bool(kinds) and kinds[-1].endswith("*")
    fixed = kinds[:-1] if rest else kinds
    if len(tokens) < len(fixed) or (not rest and len(tokens) != len(fixed)):
        raise WireError(-104, f"expected {len(fixed)} reply fields, got {len(tokens)}")
    out: list[object] = [_field(k, t) for k, t in zip(fixed, tokens)]
    if rest:
        out.append(tuple(_field(kinds[-1][:-2], t) for t in tokens[len(fixed):]))
    return tuple(out)


def _field(kind: str, tok: Token) -> object:
    if kind in ("f32[]", "f64[]"):
        if tok.kind != "block":
            raise WireError(-104, "expected a binary block")
        return decode_block(tok.value, "<f4" if kind == "f32[]" else "<f8")  # type: ignore[arg-type]
    if kind == "str":
        if tok.kind != "string":
            raise WireError(-104, "expected a quoted string")
        return tok.value
    if tok.kind != "text":
        raise WireError(-104, f"expected a {kind} field")
    if kind == "text":
        return tok.value
    return _parse_scalar(kind, tok.value)  # type: ignore[arg-type]
