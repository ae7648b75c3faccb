"""A minimal controller plug-in, as a lab would write one for its own instrument.

It drives nothing real: a "bench" lever far from any surface whose lock-in reads the steady-state response of a
damped oscillator. It shows the least a driver must implement; everything optional (thermal records, native
sweeps, two-pass lines, coarse motor, bias) is left out, and the capability set says so.
"""

from __future__ import annotations

import math
from urllib.parse import parse_qs, urlsplit

from drivers.base import Capability, Controller, ControllerInfo, Limits, Status
from drivers.errors import LimitExceeded


class BenchController(Controller):
    schemes = ("example",)

    def __init__(self, resonance_hz: float = 70e3, quality_factor: float = 150.0) -> None:
        self.info = ControllerInfo("Example Lab", "bench lever", "0001", "1.0")
        self.capabilities = frozenset({Capability.Z_SENSOR})
        self.limits = Limits(z_range_m=5e-6, bias_max_v=0.0)
        self._f0, self._q = resonance_hz, quality_factor
        self._drive = (0.0, 0.0)
        self._z = 0.0
        self._feedback = False

    @classmethod
    def from_url(cls, url: str, **options: object) -> "BenchController":
        query = {k: v[-1] for k, v in parse_qs(urlsplit(url).query).items()}
        return cls(float(query.get("f0", 70e3)), float(query.get("q", 150.0)))

    def read(self, channels):
        f, a = self._drive
        u = f / self._f0 if self._f0 else 0.0
        denom = math.hypot(1 - u * u, u / self._q) or 1e-30
        lag = math.degrees(math.atan2(u / self._q, 1 - u * u))
        values = {"deflection_v": 0.0, "sum_v": 5.0, "amplitude_v": a * 0.01 / denom if a else 0.0,
                  "phase_deg": 90.0 - lag, "z_m": self._z, "frequency_shift_hz": 0.0}
        return {name: values[name] for name in channels}

    def set_drive(self, frequency_hz, amplitude_v):
        if not 0 <= amplitude_v <= self.limits.drive_max_v:
            raise LimitExceeded("drive amplitude", amplitude_v, 0.0, self.limits.drive_max_v, "V")
        self._drive = (frequency_hz, amplitude_v)

    def drive_off(self):
        self._drive = (0.0, 0.0)

    def set_lockin_time_constant(self, seconds):
        pass

    def move_z(self, z_m):
        if not 0 <= z_m <= self.limits.z_range_m:
            raise LimitExceeded("Z extension", z_m, 0.0, self.limits.z_range_m, "m")
        self._z = z_m

    def move_xy(self, x_m, y_m):
        pass

    def withdraw(self):
        self._feedback = False
        self._z = 0.0

    def set_feedback(self, enabled, *, setpoint_v=None, p_gain=None, i_gain=None):
        self._feedback = bool(enabled)

    def status(self):
        f, a = self._drive
        return Status(engaged=False, z_m=self._z, coarse_position_m=0.0, bias_v=0.0, drive_on=a > 0,
                      drive_frequency_hz=f, drive_amplitude_v=a, feedback_on=self._feedback)

    def close(self):
        pass
