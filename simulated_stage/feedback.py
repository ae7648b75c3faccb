"""Amplitude feedback of the virtual microscope: the tapping amplitude and the PI loop that tracks the surface.

* Tapping: near the surface the amplitude is limited by the gap, A = d A_f / (d^p + A_f^p)^(1/p) (a smooth
  minimum of the free amplitude and the centre gap; a model, no source), so the feedback holds the centre gap
  where A equals the setpoint.
* Feedback: PI on the amplitude, sampled ``servo_oversample`` times per pixel, with the amplitude's own
  response time 2Q/w0 and the lock-in time constant as first-order lags, linearised about the setpoint,
  discretised exactly (zero-order hold) and solved for the whole line with one ``lfilter`` call (tracking
  error, finite bandwidth). Linearised: the error does not saturate when the tip leaves the surface.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from simulated_stage.errors import StageLimitError


@functools.lru_cache(maxsize=64)
def _closed_loop(dt_s: float, slope: float, kp: float, ki: float, tau_a: float, tau_l: float
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    from scipy.signal import cont2discrete  # scipy.signal takes ~1 s to import: only when the stage simulates

    # open loop L = slope (kp s + ki) / (s (1 + s tau_a)(1 + s tau_l)); Z/W = L / (1 + L),
    # E/W = slope s / (s (1 + s tau_a)(1 + s tau_l) + slope (kp s + ki))
    den = np.array([tau_a * tau_l, tau_a + tau_l, 1.0 + slope * kp, slope * ki])
    num_z, den_d, _ = cont2discrete((np.array([slope * kp, slope * ki]), den), dt_s, method="zoh")
    num_e, _, _ = cont2discrete((np.array([slope, 0.0]), den), dt_s, method="zoh")
    return np.ravel(num_z), np.ravel(num_e), np.ravel(den_d)


class AmplitudeFeedback:
    """Setpoint [V, peak], gains (``p_gain`` [m/m], ``i_gain_per_s`` [1/s]) and the tapping model."""

    def __init__(self, *, p_gain: float, i_gain_per_s: float, tapping_sharpness: float, servo_oversample: int) -> None:
        self.on = False
        self.setpoint_v = 0.0
        self.p_gain = p_gain
        self.i_gain_per_s = i_gain_per_s
        self.sharpness = tapping_sharpness
        self.oversample = max(1, int(servo_oversample))

    def configure(self, *, setpoint_v: float | None, p_gain: float | None, i_gain: float | None,
                  saturation_v: float) -> None:
        """Set what is given after checking it against the controller's ranges."""
        if setpoint_v is not None:
            if not 0 < setpoint_v <= saturation_v:
                raise StageLimitError("amplitude setpoint", setpoint_v, 0.0, saturation_v, "V")
            self.setpoint_v = float(setpoint_v)
        if p_gain is not None:
            if not 0 <= p_gain <= 10:
                raise StageLimitError("proportional gain", p_gain, 0.0, 10.0, "m/m")
            self.p_gain = float(p_gain)
        if i_gain is not None:
            if not 0 < i_gain <= 1e7:
                raise StageLimitError("integral gain", i_gain, 0.0, 1e7, "1/s")
            self.i_gain_per_s = float(i_gain)

    def tapping(self, gap_m: np.ndarray | float, free_m: np.ndarray | float) -> np.ndarray:
        """Amplitude limited by the centre gap (soft minimum of free amplitude and gap)."""
        p = self.sharpness
        d = np.maximum(gap_m, 0.0)
        free = np.asarray(free_m, dtype=float)
        den = (d**p + free**p) ** (1.0 / p)
        return np.divide(d * free, den, out=np.zeros(np.broadcast(d, free).shape), where=den > 0)

    def setpoint_gap_m(self, free_m: float, setpoint_m: float) -> float:
        """Centre gap at which the tapping amplitude equals the setpoint (inf if it never does)."""
        p = self.sharpness
        if setpoint_m <= 0 or free_m <= setpoint_m:
            return math.inf
        return setpoint_m * free_m / (free_m**p - setpoint_m**p) ** (1.0 / p)

    def gap_slope(self, free_m: float, setpoint_gap_m: float) -> float:
        """d(tapping amplitude)/d(centre gap) at the setpoint gap: the gain of the surface in the loop."""
        p = self.sharpness
        return free_m ** (p + 1) / (setpoint_gap_m**p + free_m**p) ** (1 + 1 / p)

    def loop(self, dt_s: float, slope: float, *, amplitude_time_s: float, lockin_time_constant_s: float
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Discrete closed loop: numerators of Z and of the amplitude error per surface height, and the common
        denominator.

        Continuous model: the amplitude follows the gap with slope ``slope`` through two first-order lags
        (the lever's amplitude response time and the lock-in), the PI controller Kp + Ki/s drives Z.
        Discretised exactly for a surface held over each servo sample (zero-order hold), so a loop that is
        stable in continuous time stays stable at any sample interval.
        """
        return _closed_loop(round(dt_s, 15), round(slope, 12), self.p_gain, self.i_gain_per_s, amplitude_time_s,
                            lockin_time_constant_s)

    @staticmethod
    def track(loop: tuple[np.ndarray, np.ndarray, np.ndarray], surface_m: np.ndarray, z_range_m: float
              ) -> tuple[np.ndarray, np.ndarray]:
        """Z extension along a line that asks for ``surface_m`` (per servo sample) and the amplitude error the
        controller sees [m], starting in equilibrium at the first sample."""
        from scipy.signal import lfilter

        num_z, num_e, den = loop
        u = surface_m[0] + lfilter(num_z, den, surface_m - surface_m[0])
        u = np.clip(np.nan_to_num(u, nan=0.0, posinf=z_range_m, neginf=0.0), 0.0, z_range_m)
        return u, lfilter(num_e, den, surface_m - surface_m[0])
