"""The electromagnet under the sample: a uniform out-of-plane field that ramps at a limited rate and settles.

A uniform field exerts no force gradient on the point probe (the gradient of a uniform field is zero), so it
never shows in the phase directly; it acts through the magnetisation it reverses: the sample's elements (see
``simulated_stage.dots``) and the tip's own coating (its moment reverses past the tip's coercive field).
Every change costs virtual time: the ramp at the magnet's rate, then the settle time. The field reading carries
the white noise of a Hall probe. Values of the default magnet are invented.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from simulated_stage.clock import VirtualClock
from simulated_stage.errors import StageLimitError


@dataclass(frozen=True)
class MagnetConfig:
    """The magnet's limits and its field sensor (SI units)."""

    max_a_per_m: float = 800e3  # |field| the coil can reach
    ramp_a_per_m_per_s: float = 50e3
    settle_s: float = 2.0  # eddy currents and the pole pieces' remanence after a ramp
    noise_a_per_m: float = 50.0  # rms of one field reading


class Electromagnet:
    """The coil's field and the time it takes to change it."""

    def __init__(self, config: MagnetConfig, clock: VirtualClock) -> None:
        self.config = config
        self.clock = clock
        self.field_a_per_m = 0.0

    def ramp_time_s(self, target_a_per_m: float) -> float:
        """Ramp plus settle time to reach ``target_a_per_m`` from the present field [s]."""
        delta = abs(float(target_a_per_m) - self.field_a_per_m)
        if delta == 0.0:
            return 0.0
        return delta / self.config.ramp_a_per_m_per_s + self.config.settle_s

    def ramp_to(self, target_a_per_m: float) -> None:
        """Ramp to ``target_a_per_m`` [A/m] and wait for it to settle; refuses anything beyond the limit."""
        target = float(target_a_per_m)
        limit = self.config.max_a_per_m
        if not (math.isfinite(target) and -limit <= target <= limit):
            raise StageLimitError("applied field", target, -limit, limit, "A/m")
        self.clock.advance(self.ramp_time_s(target))
        self.field_a_per_m = target

    def read(self, rng: np.random.Generator) -> float:
        """One reading of the field sensor [A/m]."""
        return self.field_a_per_m + self.config.noise_a_per_m * float(rng.standard_normal())


class MagnetControl:
    """The applied-field methods of the virtual microscope (mixed into it; uses its ``magnet``, ``clock``,
    ``sample`` and random generator)."""

    magnet: Electromagnet
    clock: VirtualClock
    rng: np.random.Generator

    def set_field(self, field_a_per_m: float) -> None:
        """Ramp the applied field to ``field_a_per_m`` [A/m] (+z away from the sample) and let it settle; the
        sample then sees the new field (elements and tip coating reverse where they must)."""
        self.magnet.ramp_to(field_a_per_m)
        apply = getattr(self.sample, "apply_field", None)  # a stand-in sample in the tests may not have one
        if apply is not None:
            apply(self.magnet.field_a_per_m)

    def read_field(self) -> float:
        """The applied field as the sensor reads it now [A/m] (one lock-in time constant passes)."""
        self.clock.advance(self.lockin.time_constant_s)
        return self.magnet.read(self.rng)
