"""Request lines and scalar tokens of the SCPI-style line codec, its error codes and the error queue."""

from __future__ import annotations

import math
import re
from collections import deque
from dataclasses import dataclass

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
#: A bare name: a channel, capability or key (letters, digits and _, at most 64).
NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")


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
    if not NAME.match(token):
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
