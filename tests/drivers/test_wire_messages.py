"""The network message codec: fuzzed frames give only typed protocol errors; requests and replies of every
command round-trip."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).parent))
from wire_strategies import command_with_args, command_with_reply, same  # noqa: E402

from drivers.errors import ProtocolError  # noqa: E402
from drivers.wire import messages  # noqa: E402
from drivers.wire.commands import COMMANDS, command  # noqa: E402
from drivers.wire.scpi import WireError  # noqa: E402

FAST = settings(max_examples=800, deadline=None, suppress_health_check=[HealthCheck.too_slow])
SLOW = settings(max_examples=30_000, deadline=None, suppress_health_check=[HealthCheck.too_slow])

SCALAR = st.sampled_from([None, True, False, 0, 1, -1, 2**70, 1.5, -0.0, 1e308, "", "x", "NaN", "$f", "$a"])
JSONISH = st.recursive(
    SCALAR, lambda inner: st.lists(inner, max_size=4)
    | st.dictionaries(st.sampled_from(["$f", "$a", "dtype", "n", "x"]), inner, max_size=3),
    max_leaves=8)
HEADERS = st.fixed_dictionaries(
    {"v": st.sampled_from([1, 1, 1, 2, "1", None]), "session": st.sampled_from(["abc", "", "x" * 70, 3, "a b"]),
     "id": st.sampled_from([1, -1, True, 2**80, "7", None]),
     "cmd": st.sampled_from([c.spelling for c in COMMANDS] + ["MOT:Z", "nope", 5])},
    optional={"args": JSONISH, "ok": st.sampled_from([True, False, 1, None]), "fields": JSONISH,
              "code": SCALAR, "message": SCALAR},
).map(lambda d: json.dumps(d).encode())
FRAME = st.binary(max_size=100) | HEADERS
FRAMES = st.lists(FRAME, min_size=0, max_size=4)


def _fuzz(frames):
    try:
        messages.decode_request(frames)
    except ProtocolError as exc:
        assert isinstance(exc, WireError) and exc.code < 0
    messages.peek_ids(frames)
    for cmd in (command("STATus?"), command("SCAN:LINE?"), command("MEASure:READ?"), command("*IDN?")):
        try:
            messages.decode_reply(cmd, frames)
        except ProtocolError as exc:
            assert isinstance(exc, WireError)


@FAST
@given(FRAMES)
def test_frames_fuzzed(frames):
    _fuzz(frames)


@pytest.mark.slow
@SLOW
@given(FRAMES)
def test_frames_fuzzed_long(frames):
    _fuzz(frames)


@settings(max_examples=300, deadline=None)
@given(command_with_args(), st.integers(0, 2**62))
def test_request_round_trip(case, rid):
    cmd, args = case
    req = messages.Request("session_1", rid, cmd, args)
    back = messages.decode_request(messages.encode_request(req))
    assert back.command is cmd and back.id == rid and back.session == "session_1"
    assert same(back.args, args)


@settings(max_examples=300, deadline=None)
@given(command_with_reply())
def test_reply_round_trip(case):
    cmd, fields = case
    frames = messages.encode_reply(cmd, messages.Reply(7, True, fields))
    back = messages.decode_reply(cmd, frames)
    assert back.ok and back.id == 7 and same(back.fields, fields)


def test_error_reply_round_trip_and_strict_json():
    cmd = command("MOTion:Z")
    frames = messages.encode_reply(cmd, messages.Reply(3, False, code=-222, message="Data out of range;z"))
    back = messages.decode_reply(cmd, frames)
    assert (back.ok, back.code, back.message) == (False, -222, "Data out of range;z")
    # non-finite numbers travel as tagged objects, the JSON itself stays standard
    frames = messages.encode_request(messages.Request("s", 1, cmd, (float("nan"),)))
    assert b"NaN" not in frames[0]
    json.loads(frames[0], parse_constant=lambda c: pytest.fail(f"bare {c}"))


@pytest.mark.parametrize("header,code", [
    (b"not json", -102), (b"[1]", -102), (b'{"v": 9}', -100),
    (b'{"v":1,"session":"s","id":1,"cmd":"NOPE"}', -113),
    (b'{"v":1,"session":"s","id":1,"cmd":"MOTion:Z","args":["x"]}', -104),
    (b'{"v":1,"session":"s","id":1,"cmd":"MOTion:Z","args":[]}', -109),
    (b'{"v":1,"session":"s","id":1,"cmd":"MOTion:Z","args":[1,2]}', -108),
    (b'{"v":1,"session":"s","id":1,"cmd":"MOTion:Z","args":[NaN]}', -104),
    (b'{"v":1,"session":"s","id":true,"cmd":"MOTion:Z","args":[1]}', -102),
    # a non-finite marker whose value is not one of its three spellings (found by the long fuzz run)
    (b'{"v":1,"session":"a","id":1,"cmd":"*IDN?","args":[{"$f":[]}]}', -104),
    (b'{"v":1,"session":"a","id":1,"cmd":"MOTion:Z","args":[{"$f":{"x":1}}]}', -104),
    (b'{"v":1,"session":"a","id":1,"cmd":"MOTion:Z","args":[{"$f":1.5}]}', -104),
])
def test_bad_requests_have_their_codes(header, code):
    with pytest.raises(WireError) as err:
        messages.decode_request([header])
    assert err.value.code == code
