"""The exception tree of the controller layer.

One root, :class:`ControllerError`; each subclass also derives from the built-in exception that carries the
same meaning, so callers that only know Python's own exceptions still catch them sensibly.
Messages name the quantity, the value and the limit.
"""

from __future__ import annotations


class ControllerError(Exception):
    """Root of every error raised by a controller driver."""


class LinkTimeout(ControllerError, TimeoutError):
    """The controller did not answer within the allowed time."""


class LinkLost(ControllerError, ConnectionError):
    """The link to the controller is gone (port closed, peer died, network down)."""


class ProtocolError(ControllerError, ValueError):
    """A reply or request could not be parsed (corrupted, truncated or malformed)."""


class LimitExceeded(ControllerError, ValueError):
    """A requested value lies outside a hard limit of the instrument."""

    def __init__(self, quantity: str, value: float, low: float | None, high: float | None, unit: str) -> None:
        self.quantity, self.value, self.low, self.high, self.unit = quantity, value, low, high, unit
        super().__init__(
            f"{quantity} = {value:g} {unit} is outside the allowed range "
            f"[{_fmt(low)}, {_fmt(high)}] {unit}"
        )


class CapabilityMissing(ControllerError, NotImplementedError):
    """The controller does not offer the requested capability."""


class ControllerFault(ControllerError, RuntimeError):
    """The controller reported a fault; ``code`` is its numeric code (negative SCPI-style codes included)."""

    def __init__(self, code: int, message: str) -> None:
        self.code = code
        super().__init__(f"controller fault {code}: {message}")


class Aborted(ControllerError, RuntimeError):
    """The call was stopped by :meth:`drivers.base.Controller.abort` (from another thread, a link's abort
    request or a server's watchdog); the stage was then made safe.

    A RuntimeError on purpose: not an ``InterruptedError`` (an OSError meaning EINTR, which I/O code retries or
    ignores), not a ``TimeoutError``/``ConnectionError`` (links retry those), not a ``ValueError`` (bad input),
    and not a ``BaseException`` such as KeyboardInterrupt (servers and workers must report it like any failed
    call and keep serving). It is not a :class:`ControllerFault` either: the instrument reported nothing wrong.
    """


class LaserLost(ControllerFault):
    """The photodetector sum signal dropped below its limit: the laser no longer reaches the detector."""


class UnknownScheme(ControllerError, ValueError):
    """A controller URL names a scheme that no installed driver handles."""


class BadURL(ControllerError, ValueError):
    """A controller URL is malformed or its options are invalid."""


def _fmt(x: float | None) -> str:
    return "-inf" if x is None else f"{x:g}"


class InsecureBind(ControllerError, PermissionError):
    """Refusal to listen beyond loopback without CURVE keys."""


class KeyFileError(ControllerError, OSError):
    """A key file or key directory is missing, unreadable or not a CURVE key."""
