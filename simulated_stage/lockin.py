"""Drive and lock-in of the virtual microscope: the driven lever's steady state and its noisy readout.

* Driven lever: point-mass oscillator m x'' + gamma x' + (k - F') x = F_d cos(w t), m = k / w0^2,
  gamma = k / (w0 Q); steady state lag = atan2(gamma w, k - F' - m w^2) and A = F_d / |k - F' - m w^2 + i gamma w|
  (textbook; the lift-mode relation of Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53). The lock-in reports
  phase = 90 deg - lag + instrument offset, so an attractive gradient (F' > 0) reads negative.
* Lock-in noise: thermal displacement PSD of the point-mass oscillator plus the detector's white noise, in
  phase and quadrature each of variance 2 S B for a noise-equivalent bandwidth B, so the phase noise is
  sqrt(2 S B) / A with A the *peak* amplitude: at resonance this is the thermal limit of Albrecht, Gruetter,
  Horne & Rugar 1991, J. Appl. Phys. 69, 668 with <z_osc^2> = A^2 / 2.
"""

from __future__ import annotations

import math

import numpy as np

from simulated_stage.optical_lever import CHI, OpticalLever
from simulated_stage.thermal_mode import KB


def driven_response(frequency_hz: np.ndarray | float, *, spring_constant_n_per_m: float, resonance_hz: float,
                    quality_factor: float, force_gradient_n_per_m: np.ndarray | float = 0.0,
                    drive_force_n: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """Steady-state peak amplitude [m] and phase lag [rad, 0..pi] of the driven damped oscillator.

    The tip-sample force gradient softens the spring: k_eff = k - F' (textbook linear steady state).
    """
    w = 2 * np.pi * np.asarray(frequency_hz, dtype=float)
    w0 = 2 * math.pi * resonance_hz
    k = spring_constant_n_per_m
    real = k - np.asarray(force_gradient_n_per_m) - k * (w / w0) ** 2
    imag = k * w / (w0 * quality_factor)
    return drive_force_n / np.hypot(real, imag), np.arctan2(imag, real)


class LockIn:
    """The drive (on or off, frequency, amplitude) and the lock-in (time constant, phase offset) of one lever.

    Amplitudes are peak values of the end displacement [m]; ``volts_per_m`` turns them into detector volts.
    """

    def __init__(self, *, spring_constant_n_per_m: float, resonance_hz: float, quality_factor: float,
                 temperature_k: float, detector: OpticalLever, drive_m_per_v: float, phase_offset_deg: float,
                 time_constant_s: float) -> None:
        self.k, self.f0, self.q = spring_constant_n_per_m, resonance_hz, quality_factor
        self.temperature_k = temperature_k
        self.detector = detector
        self.drive_m_per_v = drive_m_per_v
        self.phase_offset_deg = phase_offset_deg
        self.time_constant_s = time_constant_s
        self.on = False
        self.frequency_hz = resonance_hz
        self.amplitude_v = 0.0

    @property
    def volts_per_m(self) -> float:
        """Dynamic (mode-1) detector gain [V/m]."""
        return 1.0 / (CHI * self.detector.invols_m_per_v)

    @property
    def amplitude_time_s(self) -> float:
        """Response time of the oscillation amplitude, 2Q/w0 [s]."""
        return 2 * self.q / (2 * math.pi * self.f0)

    def drive_force_n(self) -> float:
        if not self.on:
            return 0.0
        return self.k * self.drive_m_per_v * self.amplitude_v / self.q

    def response(self, force_gradient_n_per_m: np.ndarray | float = 0.0,
                 frequency_hz: np.ndarray | float | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Peak amplitude [m] and lag [rad] at the present drive (or at ``frequency_hz``) under a force gradient."""
        return driven_response(self.frequency_hz if frequency_hz is None else frequency_hz,
                               spring_constant_n_per_m=self.k, resonance_hz=self.f0, quality_factor=self.q,
                               force_gradient_n_per_m=force_gradient_n_per_m, drive_force_n=self.drive_force_n())

    def bandwidth_hz(self, dwell_s: float = 0.0) -> float:
        """Noise-equivalent bandwidth of the first-order low-pass [Hz], followed by a pixel average of ``dwell_s``
        (rule of thumb for the average)."""
        return 1.0 / (4.0 * self.time_constant_s + 2 * dwell_s)

    def noise_psd_m2_per_hz(self, frequency_hz):
        """Thermal displacement PSD of the point-mass oscillator plus detector white noise [m^2/Hz]."""
        u = frequency_hz / self.f0
        s_th = 2 * KB * self.temperature_k / (math.pi * self.k * self.f0 * self.q) / (
            (1 - u * u) ** 2 + (u / self.q) ** 2)
        s_det = (self.detector.white_noise_v_per_rthz / self.volts_per_m) ** 2
        return s_th + s_det

    def noise_sigma_m(self, bandwidth_hz: float, frequency_hz=None):
        """Standard deviation [m] of the in-phase and of the quadrature output: sqrt(2 S B)."""
        psd = self.noise_psd_m2_per_hz(self.frequency_hz if frequency_hz is None else frequency_hz)
        return np.sqrt(2 * psd * bandwidth_hz) if isinstance(psd, np.ndarray) else math.sqrt(2 * psd * bandwidth_hz)

    def readout(self, amplitude_m: np.ndarray, sigma_m, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Measured amplitude [m] and phase error [rad] of oscillations of ``amplitude_m`` with in-phase and
        quadrature noise of ``sigma_m`` each (one normal draw of each per value)."""
        n1, n2 = rng.standard_normal((2,) + np.shape(amplitude_m))
        inphase = amplitude_m + sigma_m * n1
        return np.hypot(inphase, sigma_m * n2), np.arctan2(sigma_m * n2, inphase)

    def phase_deg(self, lag_rad, phase_error_rad):
        """The reported phase: 90 deg - lag + the instrument's offset [deg]."""
        return 90.0 - np.degrees(lag_rad + phase_error_rad) + self.phase_offset_deg

    def resonance_shift_hz(self, force_gradient_n_per_m):
        """Shift of the resonance under a force gradient, f0 (sqrt(1 - F'/k) - 1) [Hz]."""
        return self.f0 * (np.sqrt(np.maximum(1 - force_gradient_n_per_m / self.k, 0.0)) - 1.0)

    def noise_shift_hz(self, phase_error_rad):
        """The frequency error a phase error reads as near resonance, f0 / (2Q) dphi [Hz]."""
        return self.f0 / (2 * self.q) * phase_error_rad
