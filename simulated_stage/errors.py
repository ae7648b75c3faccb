"""Errors of the simulated stage. The stage knows nothing of drivers; the simulated driver maps these."""

from __future__ import annotations

#: Fault codes of the virtual controller (StageFault.code): positive, device-specific, as SCPI reserves the
#: negative ones.
INJECTED_ERROR_CODE = 301  # a fault the injector raises on purpose
TIP_CRASH = 302
NOT_ENGAGED = 303
UNKNOWN_CHANNEL = 304
BAD_REQUEST = 305
LASER_LOST = 310  # physical or injected: the photodetector sum fell below its limit
Z_JUMP_CODE = 320  # injected: the Z readback jumped


class StageError(Exception):
    """Root of every error the simulated stage raises."""


class ScenarioError(StageError, ValueError):
    """A scenario file or table is invalid. The message names the key and, for values, the allowed range."""


class StageLimitError(StageError, ValueError):
    """A request exceeds a hard limit of the virtual instrument (quantity, value and limit in the message)."""

    def __init__(self, quantity: str, value: float, low: float | None, high: float | None, unit: str) -> None:
        self.quantity, self.value, self.low, self.high, self.unit = quantity, value, low, high, unit
        super().__init__(f"{quantity} = {value:g} {unit} is outside [{low}, {high}] {unit}")


class StageFault(StageError, RuntimeError):
    """The virtual controller reports a fault (injected or physical, such as laser loss or a crash)."""

    def __init__(self, code: int, message: str) -> None:
        self.code = code
        super().__init__(f"stage fault {code}: {message}")


class StageAborted(StageError, RuntimeError):
    """The running action was stopped on request (see ``VirtualClock.interrupt``); nothing after the stop ran."""
