"""Errors across the wire: the SCPI code and message that report an exception to a client, and the exception a
client raises again for them (the same types on both ends: -222 LimitExceeded with its fields, -241
CapabilityMissing, -231 LaserLost, 280 Aborted, other positive codes ControllerFault, -1xx ProtocolError)."""

from __future__ import annotations

import re

from drivers.wire.scpi import WireError

__all__ = ["ABORTED_CODE", "error_for", "exception_for"]

#: Device-dependent (positive) error code of a call stopped by an abort; the client raises ``Aborted`` for it.
ABORTED_CODE = 280

_LIMIT_TEXT = re.compile(r"^(.+?) = (\S+) (\S*) ?is outside the allowed range \[(\S+), (\S+)\] ?(\S*)$")


def error_for(exc: BaseException) -> tuple[int, str]:
    """The SCPI code and message that report ``exc`` to a client. Never includes anything but the error."""
    from drivers import errors as e

    if isinstance(exc, WireError):
        return exc.code, str(exc)
    if isinstance(exc, e.LimitExceeded):
        return -222, f"Data out of range;{exc}"
    if isinstance(exc, e.CapabilityMissing):
        return -241, f"Hardware missing;{exc}"
    if isinstance(exc, e.Aborted):
        return ABORTED_CODE, f"Aborted;{exc}"
    if isinstance(exc, e.ControllerFault):
        plain = re.sub(r"^controller fault -?\d+: ", "", str(exc))  # the receiving end adds it again
        if isinstance(exc, e.LaserLost):
            return -231, f"Data questionable;{exc.code};{plain}"
        code = exc.code if isinstance(exc.code, int) and exc.code != 0 and -999 <= exc.code <= 32767 else -300
        return code, f"Device-specific error;{plain}"
    if isinstance(exc, (e.LinkTimeout, e.LinkLost)):
        return -240, f"Hardware error;{type(exc).__name__}: {exc}"
    if isinstance(exc, e.ControllerError):
        return -200, f"Execution error;{type(exc).__name__}: {exc}"
    if isinstance(exc, (ValueError, TypeError)):
        return -224, f"Illegal parameter value;{type(exc).__name__}: {str(exc)[:200]}"
    return -200, f"Execution error;{type(exc).__name__}: {str(exc)[:200]}"


def exception_for(code: int, message: str) -> Exception:
    """The client-side exception for an error reported by the server (inverse of :func:`error_for`)."""
    from drivers import errors as e

    _, _, info = message.partition(";")
    info = info or message
    if code == -222:
        m = _LIMIT_TEXT.match(info)
        if m:
            q, v, unit, lo, hi, _ = m.groups()
            to_f = lambda t: None if t in ("-inf", "inf") else float(t)  # noqa: E731
            try:
                return e.LimitExceeded(q, float(v), to_f(lo), to_f(hi), unit)
            except ValueError:
                pass
        return e.ControllerFault(code, info)
    if code == -241:
        return e.CapabilityMissing(info)
    if code == ABORTED_CODE:
        return e.Aborted(info)
    if code == -231:
        m = re.match(r"^(-?\d{1,6});(.*)$", info, re.S)
        return e.LaserLost(int(m.group(1)), m.group(2)) if m else e.LaserLost(code, info)
    if -199 <= code <= -100:
        return WireError(code, info)
    return e.ControllerFault(code, info)
