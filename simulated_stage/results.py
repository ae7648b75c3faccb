"""What the virtual microscope returns: its status, sweeps, two-pass lines and force curves (SI units)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["StageStatus", "SweepResult", "PassResult", "LineResult", "ForceCurveResult"]


@dataclass(frozen=True)
class StageStatus:
    engaged: bool
    z_m: float
    coarse_position_m: float
    bias_v: float
    drive_on: bool
    drive_frequency_hz: float
    drive_amplitude_v: float
    feedback_on: bool
    faults: tuple[str, ...] = ()


@dataclass(frozen=True)
class SweepResult:
    frequency_hz: np.ndarray
    amplitude_v: np.ndarray  # peak amplitude of the deflection oscillation
    phase_deg: np.ndarray


@dataclass(frozen=True)
class PassResult:
    lift_height_m: float
    bias_v: float
    phase_deg: np.ndarray
    amplitude_v: np.ndarray
    frequency_shift_hz: np.ndarray


@dataclass(frozen=True)
class LineResult:
    topography_m: np.ndarray  # surface height as tracked by the feedback (true height + tracking error)
    amplitude_error_v: np.ndarray  # amplitude minus setpoint during the first pass
    passes: list[PassResult] = field(default_factory=list)


@dataclass(frozen=True)
class ForceCurveResult:
    z_m: np.ndarray
    deflection_v: np.ndarray
    retract_z_m: np.ndarray
    retract_deflection_v: np.ndarray
