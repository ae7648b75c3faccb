"""The SCPI line codec: fuzzed with arbitrary bytes (only typed protocol errors, never a crash) and round trips
of every command's arguments and every reply's fields as properties."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

sys.path.insert(0, str(Path(__file__).parent))
from wire_strategies import args_for, command_with_args, command_with_reply, same  # noqa: E402

from drivers.errors import ProtocolError  # noqa: E402
from drivers.wire import scpi  # noqa: E402
from drivers.wire.commands import resolve  # noqa: E402

FAST = settings(max_examples=1000, deadline=None, suppress_health_check=[HealthCheck.too_slow])
SLOW = settings(max_examples=50_000, deadline=None, suppress_health_check=[HealthCheck.too_slow])

# bytes biased towards the codec's own syntax so that the fuzzer reaches deep paths
SYNTAX = st.lists(st.sampled_from([b"#", b"#1", b"#2", b"#9", b"\"", b",", b";", b"\n", b"?", b"*IDN", b":",
                                   b"MOT:Z", b" ", b"1e-6", b"NAN", b"\x00", b"\xff", b"0", b"5"]) | st.binary(max_size=8),
                  max_size=30).map(b"".join)
JUNK = st.binary(max_size=300) | SYNTAX


def _only_protocol_errors(fn, *args):
    try:
        return fn(*args)
    except ProtocolError as exc:
        assert isinstance(exc, scpi.WireError) and exc.code < 0
        return None


def _fuzz_request_line(data: bytes) -> None:
    line = data.split(b"\n")[0]
    parsed = _only_protocol_errors(scpi.split_line, line)
    for pc in parsed or ():
        cmd = _only_protocol_errors(resolve, pc.header, pc.query)
        if cmd is not None:
            _only_protocol_errors(scpi.decode_params, tuple(p.kind for p in cmd.params), pc.params)


def _fuzz_reply(data: bytes) -> None:
    end = _only_protocol_errors(scpi.reply_end, data)
    answers = _only_protocol_errors(scpi.parse_reply, data[:end] if end else data)
    for tokens in answers or ():
        for kinds in (("int", "str"), ("f32[]",), ("float",) * 3, ("names*",), ("bool", "floats*")):
            _only_protocol_errors(scpi.decode_answer, kinds, tokens)


@FAST
@given(JUNK)
def test_request_lines_fuzzed(data):
    _fuzz_request_line(data)


@FAST
@given(JUNK)
def test_replies_fuzzed(data):
    _fuzz_reply(data)


@pytest.mark.slow
@SLOW
@given(JUNK)
def test_codec_fuzzed_long(data):
    _fuzz_request_line(data)
    _fuzz_reply(data)


ROUND = settings(max_examples=300, deadline=None)
ROUND_SLOW = settings(max_examples=5000, deadline=None)


def _request_round_trip(case):
    cmd, args = case
    kinds = tuple(p.kind for p in cmd.params)
    line = scpi.format_line([scpi.format_command(cmd.spelling, scpi.encode_params(kinds, args))])
    (parsed,) = scpi.split_line(line[:-1])
    assert resolve(parsed.header, parsed.query) is cmd
    assert same(scpi.decode_params(kinds, parsed.params), args)


def _reply_round_trip(case, copies):
    cmd, fields = case
    message = b";".join([scpi.encode_answer(cmd.reply, fields)] * copies) + b"\n"
    # the framing must find the end exactly, whatever bytes the blocks contain, and nothing earlier
    assert scpi.reply_end(message + b"junk after") == len(message)
    assert scpi.reply_end(message[:-1]) is None
    answers = scpi.parse_reply(message)
    assert len(answers) == copies
    for tokens in answers:
        assert same(scpi.decode_answer(cmd.reply, tokens), fields)


test_request_round_trip = ROUND(given(command_with_args())(_request_round_trip))
test_reply_round_trip = ROUND(given(command_with_reply(), st.integers(1, 3))(_reply_round_trip))
test_request_round_trip_long = pytest.mark.slow(ROUND_SLOW(given(command_with_args())(_request_round_trip)))
test_reply_round_trip_long = pytest.mark.slow(
    ROUND_SLOW(given(command_with_reply(), st.integers(1, 3))(_reply_round_trip)))


@settings(max_examples=200, deadline=None)
@given(args_for(("f64[]",)), st.binary(max_size=20))
def test_block_framing_ignores_following_bytes(fields, tail):
    block = scpi.encode_block(fields[0], "<f8")
    message = block + b"\n"
    assert scpi.reply_end(message + tail) == len(message)
    (tokens,) = scpi.parse_reply(message)
    assert same(scpi.decode_block(tokens[0].value, "<f8"), fields[0])


def test_block_header_is_ieee4882_definite_length():
    values = np.array([1.0, -2.5], np.float32)
    block = scpi.encode_block(values, "<f4")
    assert block == b"#18" + values.astype("<f4").tobytes()
    big = scpi.encode_block(np.zeros(300), "<f8")
    assert big.startswith(b"#42400")


def test_header_forms_and_case():
    assert resolve("MOT:Z", False) is resolve("motion:z", False) is resolve("Motion:Z", False)
    assert resolve("*idn", True).header == "*IDN"
    with pytest.raises(scpi.WireError) as err:
        resolve("MOTI:Z", False)  # neither the short nor the long form
    assert err.value.code == -113
    with pytest.raises(scpi.WireError) as err:
        resolve("STATus", False)  # a query sent as a command
    assert err.value.code == -113


@pytest.mark.parametrize("line,code", [
    (b"MOT:Z \x01", -101), (b"MOT:Z \"abc", -102), (b"MOT:Z 1,,2", -102), (b"x" * scpi.MAX_LINE, -363),
    (b"12:Z 1", -102), (b"\xc3\xa9", -101),
])
def test_bad_lines_have_their_codes(line, code):
    with pytest.raises(scpi.WireError) as err:
        scpi.split_line(line)
    assert err.value.code == code


@pytest.mark.parametrize("kinds,tokens,code", [
    (("float",), ("abc",), -104), (("float",), (), -109), (("float",), ("1", "2"), -108),
    (("int",), ("1.5",), -104), (("bool",), ("maybe",), -104), (("str",), ("abc",), -104),
])
def test_bad_parameters_have_their_codes(kinds, tokens, code):
    with pytest.raises(scpi.WireError) as err:
        scpi.decode_params(kinds, tokens)
    assert err.value.code == code


def test_compound_line_and_quotes():
    cmds = scpi.split_line(b'*CLS;SYST:ECHO? "a;b,""c""";:MOT:Z 1e-6')
    assert [c.header for c in cmds] == ["*CLS", "SYST:ECHO", "MOT:Z"]
    assert scpi.parse_string(cmds[1].params[0]) == 'a;b,"c"'


def test_error_queue_fifo_overflow_and_empty():
    q = scpi.ErrorQueue(size=3)
    assert q.pop() == (0, "No error")
    for code in (-100, -113, -222, -224):
        q.push(code, scpi.STANDARD_ERRORS[code])
    assert [q.pop()[0] for _ in range(4)] == [-100, -113, -350, 0]
    assert scpi.format_error(-222, 'Data out of range;z "x"') == '-222,"Data out of range;z ""x"""'
