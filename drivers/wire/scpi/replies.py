"""Replies of the SCPI-style line codec: IEEE 488.2 definite-length blocks, framing a reply by its length, and
splitting it into answers and fields."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from drivers.wire.scpi.lines import MAX_BLOCK, WireError

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
