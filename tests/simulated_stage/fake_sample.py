"""A small flat sample that follows the Sample interface, for instrument tests independent of the real physics."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class FakeInteraction:
    force_gradient_n_per_m: np.ndarray
    force_n: np.ndarray
    magnetic_gradient_n_per_m: np.ndarray
    electrostatic_gradient_n_per_m: np.ndarray
    vdw_gradient_n_per_m: np.ndarray


class FlatSample:
    """Flat surface (optionally a sinusoidal height profile) with an attractive gradient
    F'(gap) = g0 * (z0 / gap)^2 (an invented smooth model) plus an optional lateral stripe pattern of
    gradient +-stripe_n_per_m (decaying as exp(-2 pi gap / period)) and a gap-independent
    ``constant_n_per_m``, at period ``period_m`` along x. Contact: a stiff linear spring."""

    true_cpd_v = 0.0

    def __init__(self, *, g0_n_per_m: float = 0.0, z0_m: float = 20e-9, stripe_n_per_m: float = 0.0,
                 period_m: float = 1e-6, height_m: float = 0.0, height_period_m: float = 2e-6,
                 contact_n_per_m: float = 1e3, adhesion_n: float = 0.0, constant_n_per_m: float = 0.0) -> None:
        self.constant = constant_n_per_m
        self.g0, self.z0, self.stripe, self.period = g0_n_per_m, z0_m, stripe_n_per_m, period_m
        self.height, self.height_period = height_m, height_period_m
        self.contact, self.adhesion = contact_n_per_m, adhesion_n
        self.exposures = 0
        self.last_exposure = None
        self.exposure_log: list[np.ndarray] = []

    @property
    def magnetisation_version(self) -> int:
        return 0

    def topography_m(self, x_m, y_m):
        x = np.asarray(x_m, dtype=float)
        return self.height * np.sin(2 * np.pi * x / self.height_period) + 0.0 * np.asarray(y_m)

    def interaction(self, x_m, y_m, gap_m, *, bias_v, amplitude_m):
        x = np.asarray(x_m, dtype=float)
        gap = np.broadcast_to(np.asarray(gap_m, dtype=float), x.shape)
        smooth = self.g0 * (self.z0 / gap) ** 2 + self.constant
        mag = self.stripe * np.sign(np.sin(2 * np.pi * x / self.period)) * np.exp(-2 * np.pi * gap / self.period)
        zero = np.zeros_like(gap)
        return FakeInteraction(smooth + mag, zero, mag, smooth, zero)

    def contact_force_n(self, x_m, y_m, gap_m, *, bias_v=0.0):
        gap = np.asarray(gap_m, dtype=float)
        # invented: linear repulsion in contact, a short-range attraction of depth adhesion_n outside
        return np.where(gap < 0, -self.contact * gap - self.adhesion, -self.adhesion * np.exp(-gap / 1e-9))

    def expose(self, x_m, y_m, gap_m):
        self.exposures += 1
        self.last_exposure = np.asarray(gap_m)
        self.exposure_log.append(self.last_exposure)
        return 0
