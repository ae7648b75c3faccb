"""Controller interface and drivers: everything that speaks to a microscope controller."""

from drivers.base import (
    CHANNELS,
    Capability,
    Controller,
    ControllerInfo,
    ForceCurve,
    LineData,
    LineSpec,
    Limits,
    PassData,
    SecondPass,
    Status,
    SweepData,
)
from drivers.errors import (
    BadURL,
    CapabilityMissing,
    ControllerError,
    ControllerFault,
    LaserLost,
    LimitExceeded,
    LinkLost,
    LinkTimeout,
    ProtocolError,
    UnknownScheme,
)
from drivers.registry import available, open_controller, redact

__all__ = [
    "CHANNELS", "Capability", "Controller", "ControllerInfo", "ForceCurve", "LineData", "LineSpec", "Limits",
    "PassData", "SecondPass", "Status", "SweepData", "BadURL", "CapabilityMissing", "ControllerError",
    "ControllerFault", "LaserLost", "LimitExceeded", "LinkLost", "LinkTimeout", "ProtocolError",
    "UnknownScheme", "available", "open_controller", "redact",
]
