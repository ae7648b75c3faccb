"""Line codec for byte streams (serial lines, pseudo-terminals, raw sockets), SCPI style.

Requests are one ASCII line each (``\\n`` terminated, ``\\r`` tolerated, at most :data:`MAX_LINE` bytes);
several commands may share a line separated by ``;``, each read from the root of the tree. A command is a
header (``MOTion:Z``, ``*IDN?``), a space, then comma-separated parameters: numbers, ``NAN``/``INF``,
``DEF`` (keep the present value), bare words, or quoted strings (``"..."`` with ``""`` for a quote).

Replies are one message per request line: the answers of its queries separated by ``;``, each a
comma-separated list of fields; arrays travel as IEEE 488.2 definite-length blocks ``#<n><length><bytes>``
of little-endian floats, so a reply may contain any byte, and :func:`reply_end` frames it by length.

Every decoding problem raises :class:`WireError`, a :class:`drivers.errors.ProtocolError` carrying the
standard SCPI error code that the server queues for ``SYSTem:ERRor?``.
"""

from __future__ import annotations

import math
import re
from collections import deque
from dataclasses import dataclass

import numpy as np

from drivers.errors import ProtocolError

#: Longest request line accepted, terminator included. Longer input is discarded up to the next newline.
MAX_LINE = 65536
#: Largest array a reply block may carry, in bytes (a 2^20-sample float32 thermal chunk fits).
MAX_BLOCK = 1 << 23

#: The standard SCPI error texts (SCPI-99 volume 2, chapter 21) for the codes this project uses.
STANDARD_ERRORS: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -161: "Invalid block data",
    -113: "Undefined header",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -223: "Too much data",
    -224: "Illegal parameter value",
    -231: "Data questionable",
    -240: "Hardware error",
    -241: "Hardware missing",
    -300: "Device-specific error",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
}


class WireError(ProtocolError):
    """A protocol-level error with its SCPI code; ``info`` is the device-dependent detail."""

    def __init__(self, code: int, info: str = "") -> None:
        self.code = code
        self.info = info
        text = STANDARD_ERRORS.get(code, "Error")
        super().__init__(f"{text};{info}" if info else text)


# ---- request lines ------------------------------------------------------------------------------------

_HEADER = re.compile(r"^:?(\*[A-Za-z]{3}\??|[A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*\??)$")


@dataclass(frozen=True)
class ParsedCommand:
    """One command of a request line: its header as written (without ``?``), query flag, raw parameters."""

    header: str
    query: bool
    params: tuple[str, ...]  # tokens; quoted strings keep their quotes so the type is still visible


def split_line(line: bytes) -> list[ParsedCommand]:
    """Parse one request line (terminator already removed) into its commands.

    Raises :class:`WireError` with -363 for an over-long line, -101 for a non-printable or non-ASCII byte,
    -102 for a syntax error (unbalanced quotes, empty parameter, bad header).
    """
    if len(line) >= MAX_LINE:
        raise WireError(-363, f"line of {len(line)} bytes exceeds the limit of {MAX_LINE - 1} bytes")
    if line.endswith(b"\r"):
        line = line[:-1]
    bad = next((i for i, b in enumerate(line) if not (32 <= b < 127 or b == 9)), None)
    if bad is not None:
        raise WireError(-101, f"byte 0x{line[bad]:02x} at position {bad} is not printable ASCII")
    text = line.decode("ascii")
    commands = []
    for part in _split_outside_quotes(text, ";"):
        part = part.strip()
        if not part:
            continue
        head, rest = (re.split(r"[ \t]+", part, maxsplit=1) + [""])[:2]
        if not _HEADER.match(head):
            raise WireError(-102, f"malformed header {_clip(head)!r}")
        query = head.endswith("?")
        head = head.lstrip(":").rstrip("?")
        rest = rest.strip()
        params: tuple[str, ...] = ()
        if rest:
            tokens = [t.strip() for t in _split_outside_quotes(rest, ",")]
            if any(not t for t in tokens):
                raise WireError(-102, f"empty parameter in {_clip(rest)!r}")
            params = tuple(tokens)
        commands.append(ParsedCommand(head, query, params))
    return commands


def _split_outside_quotes(text: str, sep: str) -> list[str]:
    parts, start, quote, i = [], 0, "", 0
    while i < len(text):
        ch = text[i]
        if quote:
            if ch == quote:
                if i + 1 < len(text) and text[i + 1] == quote:
                    i += 1  # doubled quote inside a string
                else:
                    quote = ""
        elif ch in "\"'":
            quote = ch
        elif ch == sep:
            parts.append(text[start:i])
            start = i + 1
        i += 1
    if quote:
        raise WireError(-102, "unterminated string")
    parts.append(text[start:])
    return parts


def _clip(text: str, n: int = 40) -> str:
    return text if len(text) <= n else text[:n] + "..."


def format_command(header: str, params: tuple[str, ...] = ()) -> bytes:
    """One command as it appears on a line (no terminator): header, a space, comma-separated parameters."""
    return (header + (" " + ",".join(params) if params else "")).encode("ascii")


def format_line(commands: list[bytes]) -> bytes:
    """Join commands into one request line with its terminator; refuses lines longer than :data:`MAX_LINE`."""
    line = b";".join(commands) + b"\n"
    if len(line) > MAX_LINE:
        raise WireError(-363, f"request line of {len(line)} bytes exceeds {MAX_LINE} bytes")
    return line


# ---- scalar tokens -------------------------------------------------------------------------------------

_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d{1,3})?$")
_INT = re.compile(r"^[+-]?\d{1,18}$")
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")


def format_float(x: float) -> str:
    """Shortest text that reads back to the same float64; ``NAN``, ``INF``, ``-INF`` for the non-finite."""
    x = float(x)
    if math.isnan(x):
        return "NAN"
    if math.isinf(x):
        return "INF" if x > 0 else "-INF"
    return repr(x)


def parse_float(token: str) -> float:
    t = token.upper()
    if t in ("NAN", "INF", "+INF", "-INF"):
        return float(t.replace("+", ""))
    if not _NUMBER.match(token):
        raise WireError(-104, f"{_clip(token)!r} is not a number")
    return float(token)


def parse_int(token: str) -> int:
    if not _INT.match(token):
        raise WireError(-104, f"{_clip(token)!r} is not an integer")
    return int(token)


def parse_bool(token: str) -> bool:
    t = token.upper()
    if t in ("1", "ON"):
        return True
    if t in ("0", "OFF"):
        return False
    raise WireError(-104, f"{_clip(token)!r} is not a boolean (ON, OFF, 1 or 0)")


def parse_name(token: str) -> str:
    if not _NAME.match(token):
        raise WireError(-104, f"{_clip(token)!r} is not a name")
    return token


def format_string(text: str) -> str:
    if any(not (32 <= ord(c) < 127) for c in text):
        raise WireError(-101, "string contains a non-printable or non-ASCII character")
    return '"' + text.replace('"', '""') + '"'


def parse_string(token: str) -> str:
    if len(token) < 2 or token[0] not in "\"'" or token[-1] != token[0]:
        raise WireError(-104, f"{_clip(token)!r} is not a quoted string")
    q = token[0]
    inner = token[1:-1]
    if (q in inner.replace(q + q, "")):
        raise WireError(-102, f"stray quote in {_clip(token)!r}")
    return inner.replace(q + q, q)


# ---- replies -------------------------------------------------------------------------------------------

def encode_block(values: np.ndarray, dtype: str) -> bytes:
    """An IEEE 488.2 definite-length block of ``values`` as little-endian ``dtype`` ("<f4" or "<f8")."""
    payload = np.ascontiguousarray(values, dtype=np.dtype(dtype)).tobytes()
    length = str(len(payload)).encode("ascii")
    if len(length) > 9:
        raise WireError(-223, f"block of {len(payload)} bytes is too long for a definite-length header")
    return b"#" + str(len(length)).encode("ascii") + length + payload


def _block_extent(buf: bytes, pos: int) -> tuple[int, int] | None:
    """(payload start, payload end) of a block starting at ``pos``; None if the header is incomplete."""
    if pos + 2 > len(buf):
        return None
    nd = buf[pos + 1] - 48
    if not 1 <= nd <= 9:
        raise WireError(-161, "block header digit count is not 1..9")
    if pos + 2 + nd > len(buf):
        return None
    digits = buf[pos + 2: pos + 2 + nd]
    if not digits.isdigit():
        raise WireError(-161, "block length is not decimal")
    length = int(digits)
    if length > MAX_BLOCK:
        raise WireError(-223, f"block of {length} bytes exceeds the limit of {MAX_BLOCK} bytes")
    start = pos + 2 + nd
    return start, start + length


def reply_end(buf: bytes, start: int = 0) -> int | None:
    """Index just past the ``\\n`` ending the reply that begins at ``start``; None while incomplete.

    Blocks are skipped by their declared length and quoted strings as a whole, so a newline inside either
    does not end the reply. Raises :class:`WireError` on a malformed block header.
    """
    i, n = start, len(buf)
    field_start = True
    while i < n:
        b = buf[i]
        if field_start and b == 0x23:  # '#'
            extent = _block_extent(buf, i)
            if extent is None or extent[1] > n:
                return None
            i = extent[1]
            field_start = False
            continue
        if b == 0x22:  # '"'
            j = i + 1
            while True:
                j = buf.find(b'"', j)
                if j < 0:
                    return None
                if j + 1 < n and buf[j + 1] == 0x22:
                    j += 2
                    continue
                if j + 1 >= n:
                    return None  # cannot tell yet whether the quote is doubled
                break
            i = j + 1
            field_start = False
            continue
        if b == 0x0A:
            return i + 1
        field_start = b in (0x2C, 0x3B)  # ',' ';'
        i += 1
    return None


@dataclass(frozen=True)
class Token:
    """One reply field: kind is "text" (number or bare word), "string" (unquoted already) or "block"."""

    kind: str
    value: str | bytes


def parse_reply(message: bytes) -> list[list[Token]]:
    """Split one complete reply (terminator included or not) into its answers and their fields."""
    if message.endswith(b"\n"):
        message = message[:-1]
    answers: list[list[Token]] = [[]]
    i, n = 0, len(message)
    if n == 0:
        return answers
    while True:
        if i < n and message[i] == 0x23:
            extent = _block_extent(message, i)
            if extent is None or extent[1] > n:
                raise WireError(-161, "truncated block")
            answers[-1].append(Token("block", message[extent[0]:extent[1]]))
            i = extent[1]
        elif i < n and message[i] == 0x22:
            j = i + 1
            while True:
                j = message.find(b'"', j)
                if j < 0:
                    raise WireError(-102, "unterminated string in reply")
                if j + 1 < n and message[j + 1] == 0x22:
                    j += 2
                    continue
                break
            raw = message[i + 1:j]
            try:
                text = raw.decode("ascii")
            except UnicodeDecodeError as exc:
                raise WireError(-101, "non-ASCII byte in reply string") from exc
            answers[-1].append(Token("string", text.replace('""', '"')))
            i = j + 1
        else:
            j = i
            while j < n and message[j] not in (0x2C, 0x3B):
                j += 1
            raw = message[i:j].strip()
            if not raw and not answers[-1] and (j >= n or message[j] == 0x3B):
                pass  # an empty answer (a list with no entries)
            elif not raw or any(not (32 <= b < 127) for b in raw):
                raise WireError(-102, "empty or non-printable reply field")
            else:
                answers[-1].append(Token("text", raw.decode("ascii")))
            i = j
        if i >= n:
            return answers
        sep = message[i]
        i += 1
        if sep == 0x3B:
            answers.append([])
            if i >= n:
                return answers
        elif sep == 0x2C:
            if i >= n:
                raise WireError(-102, "reply ends with a separator")
        else:
            raise WireError(-102, f"unexpected byte 0x{sep:02x} after a reply field")


def decode_block(payload: bytes, dtype: str) -> np.ndarray:
    """The array carried by a block payload (little-endian ``dtype``), as float64."""
    size = np.dtype(dtype).itemsize
    if len(payload) % size:
        raise WireError(-104, f"block of {len(payload)} bytes is not a whole number of {dtype} values")
    return np.frombuffer(payload, dtype=np.dtype(dtype)).astype(np.float64)


# ---- error queue ---------------------------------------------------------------------------------------

class ErrorQueue:
    """The instrument's error queue: first in, first out, bounded; overflow replaces the newest by -350."""

    def __init__(self, size: int = 32) -> None:
        self._items: deque[tuple[int, str]] = deque()
        self._size = size

    def push(self, code: int, message: str) -> None:
        if len(self._items) >= self._size:
            self._items[-1] = (-350, STANDARD_ERRORS[-350])
            return
        self._items.append((code, message))

    def push_error(self, exc: WireError) -> None:
        self.push(exc.code, str(exc))

    def pop(self) -> tuple[int, str]:
        return self._items.popleft() if self._items else (0, "No error")

    def clear(self) -> None:
        self._items.clear()

    def __len__(self) -> int:
        return len(self._items)


def format_error(code: int, message: str) -> str:
    """``<code>,"<message>"`` as ``SYSTem:ERRor?`` answers."""
    clean = "".join(c if 32 <= ord(c) < 127 else "?" for c in message)[:255]
    return f'{code},{format_string(clean)}'


# ---- typed values <-> tokens (kinds as in drivers.wire.commands) ---------------------------------------

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
