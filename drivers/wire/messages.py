"""Network message form of the command set: a JSON header frame plus raw little-endian array frames.

Request: one frame ``{"v": 1, "session": S, "id": N, "cmd": "MOTion:Z", "args": [...]}``. ``session`` names
the client (a random token chosen when it starts) and ``id`` counts its requests; the server remembers the
replies it sent per session so that a request retried after a lost reply is answered from memory instead of
being executed again.

Reply: ``{"v": 1, "id": N, "ok": true, "fields": [...]}`` followed by one frame per array field (the field
itself is ``{"$a": index, "dtype": "<f4", "n": count}``), or ``{"v": 1, "id": N, "ok": false, "code": -222,
"message": "..."}``. Non-finite floats travel as ``{"$f": "nan" | "inf" | "-inf"}`` so the JSON stays standard.
Every decoding problem raises :class:`drivers.wire.scpi.WireError` (a ProtocolError) with its SCPI code.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass

import numpy as np

from drivers.wire.checks import check_types, check_value
from drivers.wire.commands import BY_HEADER, Command
from drivers.wire.scpi import WireError

VERSION = 1
MAX_HEADER = 1 << 20
MAX_FRAMES = 16
_SESSION = re.compile(r"^[A-Za-z0-9_-]{1,64}$")
_NONFINITE = {"nan": math.nan, "inf": math.inf, "-inf": -math.inf}


@dataclass(frozen=True)
class Request:
    session: str
    id: int
    command: Command
    args: tuple


@dataclass(frozen=True)
class Reply:
    id: int
    ok: bool
    fields: tuple = ()
    code: int = 0
    message: str = ""


def _to_json(v: object) -> object:
    if isinstance(v, float) and not math.isfinite(v):
        return {"$f": "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")}
    if isinstance(v, (tuple, list)):
        return [_to_json(x) for x in v]
    return v


def _from_json(v: object) -> object:
    if isinstance(v, dict):
        tag = v.get("$f") if set(v) == {"$f"} else None
        if isinstance(tag, str) and tag in _NONFINITE:  # any other value (a list, a number) is malformed
            return _NONFINITE[tag]
        raise WireError(-104, "unexpected object in the arguments")
    if isinstance(v, list):
        return tuple(_from_json(x) for x in v)
    return v


def _dumps(obj: dict) -> bytes:
    return json.dumps(obj, allow_nan=False, separators=(",", ":")).encode("utf-8")


def _loads(frame: bytes) -> dict:
    if len(frame) > MAX_HEADER:
        raise WireError(-223, f"header frame of {len(frame)} bytes exceeds {MAX_HEADER} bytes")
    try:
        obj = json.loads(bytes(frame).decode("utf-8"), parse_constant=_reject_constant)
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError) as exc:
        raise WireError(-102, "header frame is not valid JSON") from exc
    if not isinstance(obj, dict):
        raise WireError(-102, "header frame is not a JSON object")
    if obj.get("v") != VERSION:
        raise WireError(-100, f"protocol version {str(obj.get('v'))[:20]!r} is not {VERSION}")
    return obj


def _reject_constant(name: str) -> object:
    raise WireError(-104, f"bare {name} is not allowed; use {{\"$f\": ...}}")


def encode_request(req: Request) -> list[bytes]:
    return [_dumps({"v": VERSION, "session": req.session, "id": req.id, "cmd": req.command.spelling,
                    "args": _to_json(list(req.args))})]


def peek_ids(frames: list[bytes]) -> tuple[str, int] | None:
    """(session, id) of a request if they can be read, even when the rest of it is bad."""
    try:
        obj = _loads(frames[0])
    except (WireError, IndexError):
        return None
    s, i = obj.get("session"), obj.get("id")
    if isinstance(s, str) and _SESSION.match(s) and isinstance(i, int) and not isinstance(i, bool):
        return s, i
    return None


def decode_request(frames: list[bytes]) -> Request:
    """A typed request; raises WireError (-102 syntax, -113 unknown command, -104/-108/-109 arguments)."""
    if len(frames) != 1:
        raise WireError(-102, f"a request has 1 frame, got {len(frames)}")
    obj = _loads(frames[0])
    ids = peek_ids(frames)
    if ids is None:
        raise WireError(-102, "request lacks a valid session token or integer id")
    cmd = BY_HEADER.get(obj.get("cmd")) if isinstance(obj.get("cmd"), str) else None
    if cmd is None:
        raise WireError(-113, f"unknown command {str(obj.get('cmd'))[:40]!r}")
    raw = obj.get("args", [])
    if not isinstance(raw, list):
        raise WireError(-104, "args must be a list")
    args = check_types(cmd, tuple(_from_json(raw)))
    return Request(ids[0], ids[1], cmd, args)


def encode_reply(cmd: Command, reply: Reply) -> list[bytes]:
    if not reply.ok:
        return [_dumps({"v": VERSION, "id": reply.id, "ok": False, "code": reply.code,
                        "message": reply.message})]
    fields: list[object] = []
    arrays: list[bytes] = []
    for kind, v in zip(cmd.reply, reply.fields, strict=True):
        if kind in ("f32[]", "f64[]"):
            dtype = "<f4" if kind == "f32[]" else "<f8"
            arr = np.ascontiguousarray(v, dtype=dtype).ravel()
            fields.append({"$a": len(arrays), "dtype": dtype, "n": int(arr.size)})
            arrays.append(arr.tobytes())
        else:
            fields.append(_to_json(v))
    return [_dumps({"v": VERSION, "id": reply.id, "ok": True, "fields": fields}), *arrays]


def decode_reply(cmd: Command, frames: list[bytes]) -> Reply:
    """The reply to ``cmd``; fields typed by the command's reply kinds."""
    if not 1 <= len(frames) <= MAX_FRAMES:
        raise WireError(-102, f"reply has {len(frames)} frames")
    obj = _loads(frames[0])
    rid = obj.get("id")
    if not isinstance(rid, int) or isinstance(rid, bool):
        raise WireError(-102, "reply lacks an integer id")
    if obj.get("ok") is False:
        code, message = obj.get("code"), obj.get("message")
        if not isinstance(code, int) or not isinstance(message, str):
            raise WireError(-102, "error reply lacks code or message")
        return Reply(rid, False, code=code, message=message)
    if obj.get("ok") is not True or not isinstance(obj.get("fields"), list):
        raise WireError(-102, "reply lacks ok/fields")
    raw = obj["fields"]
    if len(raw) != len(cmd.reply):
        raise WireError(-104, f"{cmd.spelling} reply has {len(raw)} fields, expected {len(cmd.reply)}")
    out: list[object] = []
    for kind, v in zip(cmd.reply, raw):
        if kind in ("f32[]", "f64[]"):
            out.append(_array(kind, v, frames))
        else:
            out.append(_typed(kind, _from_json(v)))
    return Reply(rid, True, tuple(out))


def _array(kind: str, ref: object, frames: list[bytes]) -> np.ndarray:
    dtype = "<f4" if kind == "f32[]" else "<f8"
    if not isinstance(ref, dict) or ref.get("dtype") != dtype or not isinstance(ref.get("$a"), int):
        raise WireError(-104, f"array field is not a {dtype} reference")
    k = ref["$a"] + 1
    if not 1 <= k < len(frames):
        raise WireError(-104, "array frame missing")
    buf = bytes(frames[k])
    if len(buf) % np.dtype(dtype).itemsize or len(buf) // np.dtype(dtype).itemsize != ref.get("n"):
        raise WireError(-104, "array frame length does not match its declared size")
    return np.frombuffer(buf, dtype=dtype).astype(np.float64)


def _typed(kind: str, v: object) -> object:
    return check_value("str" if kind == "text" else kind, v, "reply field")
