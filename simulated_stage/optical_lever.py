"""The optical lever: end displacement to photodetector volts, with detector noise.

The detector sees the end *slope*, not the end displacement. For a static end load the slope per unit
end displacement defines the static sensitivity (InvOLS, measured with a force curve); in the first flexural
mode the slope per unit end displacement is larger by chi = 1.0897, so a mode-1 displacement z reads
z / (chi * InvOLS_static) volts. With chi^2 = 0.970688 / 0.817434 the published factors hold:
k = 0.971 kB T / <z^2> for the true end displacement and k = 0.817 kB T / <(V InvOLS_static)^2> for the
optical lever (Butt & Jaschke 1995, Nanotechnology 6, 1; numbers from memory, recomputed).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

MODE1_DISPLACEMENT_FACTOR = 0.970688  # 12 / alpha1^4: first-mode share of the end-displacement variance
MODE1_OPTICAL_LEVER_FACTOR = 0.817434  # the same with a statically calibrated optical lever
CHI = math.sqrt(MODE1_DISPLACEMENT_FACTOR / MODE1_OPTICAL_LEVER_FACTOR)  # 1.089716


@dataclass(frozen=True)
class OpticalLever:
    """Photodetector of the simulated stage.

    Parameters
    ----------
    invols_m_per_v : float
        Static inverse optical-lever sensitivity [m/V] (what a force curve on a hard surface measures).
    white_noise_v_per_rthz : float
        One-sided white noise density of the deflection signal [V/sqrt(Hz)].
    flicker_v_per_rthz_at_1hz : float
        1/f noise density at 1 Hz [V/sqrt(Hz)]; it falls as 1/sqrt(f) up to ``FLICKER_BAND_HZ[1]``.
    sum_v : float
        Photodetector sum signal with the laser aligned [V].
    saturation_v : float
        The deflection channel clips at +-saturation_v.
    """

    invols_m_per_v: float = 50e-9
    white_noise_v_per_rthz: float = 2e-6
    flicker_v_per_rthz_at_1hz: float = 2e-5
    sum_v: float = 4.0
    saturation_v: float = 10.0

    def dynamic_volts(self, end_displacement_m: np.ndarray | float) -> np.ndarray | float:
        """Mode-1 end displacement (thermal motion, oscillation amplitude) to volts: z / (chi InvOLS)."""
        return end_displacement_m / (CHI * self.invols_m_per_v)

    def static_volts(self, deflection_m: np.ndarray | float) -> np.ndarray | float:
        """Static end deflection (force curves, contact) to volts: d / InvOLS."""
        return deflection_m / self.invols_m_per_v

    def white_std_v(self, rate_hz: float) -> float:
        """Per-sample standard deviation of the white noise sampled at ``rate_hz`` (one-sided density)."""
        return self.white_noise_v_per_rthz * math.sqrt(rate_hz / 2.0)

    def clip(self, volts: np.ndarray) -> np.ndarray:
        return np.clip(volts, -self.saturation_v, self.saturation_v, out=volts)


FLICKER_BAND_HZ = (0.03, 1000.0)


class FlickerNoise:
    """Streaming 1/f noise: a sum of exactly sampled Ornstein-Uhlenbeck processes with corner frequencies
    two per decade across :data:`FLICKER_BAND_HZ`, each of variance h ln(r) so that the sum of their Lorentzian
    spectra approximates h / f (common practice, no source; ripple about +-1 dB). It is generated at a
    reduced rate (at least ten times the top corner) and held, which costs little at MHz sample rates.

    Parameters
    ----------
    density_at_1hz : float
        sqrt(h): one-sided density at 1 Hz [units/sqrt(Hz)].
    rate_hz : float
    rng : numpy.random.Generator
    """

    def __init__(self, density_at_1hz: float, rate_hz: float, rng: np.random.Generator) -> None:
        self.rate_hz = rate_hz
        self._rng = rng
        self._h = density_at_1hz**2
        ratio = math.sqrt(10.0)
        lo, hi = FLICKER_BAND_HZ
        n = int(round(math.log(hi / lo) / math.log(ratio))) + 1
        corners = lo * ratio ** np.arange(n)
        self._hold = max(1, int(rate_hz // (10 * hi)))
        low_rate = rate_hz / self._hold
        corners = corners[corners < low_rate / 4]
        self._decay = np.exp(-2 * math.pi * corners / low_rate)
        self._var = self._h * math.log(ratio)
        self._state = math.sqrt(self._var) * rng.standard_normal(corners.size)
        self._used = self._hold  # samples already emitted from the present held value
        self._current = float(self._state.sum())

    def _low_rate(self, count: int) -> np.ndarray:
        from scipy.signal import lfilter  # scipy.signal takes ~1 s to import: only when the stage simulates
        out = np.zeros(count)
        u = self._rng.standard_normal((count, self._decay.size)).T  # sample-major: chunking-independent
        for i, a in enumerate(self._decay):
            y, zf = lfilter([math.sqrt(self._var * (1 - a * a))], [1.0, -a], u[i],
                            zi=[a * self._state[i]])
            self._state[i] = y[-1]
            out += y
        return out

    def next_chunk(self, samples: int) -> np.ndarray:
        """The next ``samples`` values."""
        return self.add_to(np.zeros(samples))

    def add_to(self, out: np.ndarray) -> np.ndarray:
        """Add the next ``out.size`` values to ``out`` in place (cheap: one broadcast add) and return it."""
        samples = out.size
        if self._h == 0.0 or self._decay.size == 0 or samples == 0:
            return out
        hold = self._hold
        first = min(hold - self._used, samples)
        out[:first] += self._current
        self._used += first
        rest = samples - first
        if rest == 0:
            return out
        new = -(-rest // hold)
        values = self._low_rate(new)
        full = rest // hold
        body = out[first:first + full * hold]
        body.reshape(full, hold)[...] += values[:full, None]
        tail = rest - full * hold
        if tail:
            out[first + full * hold:] += values[-1]
            self._used = tail
        else:
            self._used = hold
        self._current = float(values[-1])
        return out
