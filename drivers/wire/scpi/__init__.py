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

from drivers.wire.scpi.lines import (MAX_BLOCK, MAX_LINE, NAME, STANDARD_ERRORS, ErrorQueue, ParsedCommand,
                                     WireError, format_command, format_error, format_float, format_line, format_string,
                                     parse_bool, parse_float, parse_int, parse_name, parse_string, split_line)
from drivers.wire.scpi.replies import Token, decode_block, encode_block, parse_reply, reply_end
from drivers.wire.scpi.values import decode_answer, decode_params, encode_answer, encode_params

__all__ = [
    "MAX_BLOCK", "MAX_LINE", "NAME", "STANDARD_ERRORS", "ErrorQueue", "ParsedCommand", "Token", "WireError",
    "decode_answer", "decode_block", "decode_params", "encode_answer", "encode_block", "encode_params",
    "format_command", "format_error", "format_float", "format_line", "format_string", "parse_bool", "parse_float", "parse_int",
    "parse_name", "parse_reply", "parse_string", "reply_end", "split_line",
]
