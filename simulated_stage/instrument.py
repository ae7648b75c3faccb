"""The virtual microscope: lever, detector, positioners, drive and lock-in, feedback and two-pass lines.

Physics in brief (sources beside each piece):

* Driven lever: point-mass oscillator m x'' + gamma x' + (k - F') x = F_d cos(w t), m = k / w0^2,
  gamma = k / (w0 Q); steady state lag = atan2(gamma w, k - F' - m w^2) and A = F_d / |k - F' - m w^2 + i gamma w|
  (textbook; the lift-mode relation of Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53). The lock-in reports
  phase = 90 deg - lag + instrument offset, so an attractive gradient (F' > 0) reads negative.
* Lock-in noise: thermal displacement PSD of the point-mass oscillator plus the detector's white noise, in
  phase and quadrature each of variance 2 S B for a noise-equivalent bandwidth B, so the phase noise is
  sqrt(2 S B) / A with A the *peak* amplitude: at resonance this is the thermal limit of Albrecht, Gruetter,
  Horne & Rugar 1991, J. Appl. Phys. 69, 668 with <z_osc^2> = A^2 / 2.
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
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.signal import cont2discrete, lfilter

from simulated_stage.clock import VirtualClock
from simulated_stage.errors import StageFault, StageLimitError
from simulated_stage.lever import Lever
from simulated_stage.optical_lever import CHI, FlickerNoise, OpticalLever
from simulated_stage.scanner import CoarseMotor, XYScanner, ZPiezo
from simulated_stage.thermal_mode import KB, ThermalMode

#: Fault codes of the virtual controller (StageFault.code).
LASER_LOST = 310  # the same code the fault injector uses for an injected laser loss
TIP_CRASH = 302
NOT_ENGAGED = 303
UNKNOWN_CHANNEL = 304
BAD_REQUEST = 305

CHANNELS = ("deflection_v", "sum_v", "amplitude_v", "phase_deg", "z_m", "frequency_shift_hz")
_NEAR_M = 5e-6  # beyond this centre gap the tip-sample interaction is not evaluated (it is below any noise)


@dataclass(frozen=True)
class StageLimits:
    """Hard limits of the virtual instrument (same field names as the controller interface's limits)."""

    z_range_m: float = 10e-6
    z_speed_max_m_per_s: float = 20e-6
    bias_max_v: float = 10.0
    drive_max_v: float = 2.0
    coarse_travel_max_m: float = 2e-3
    coarse_step_m: float = 50e-9
    scan_size_max_m: float = 90e-6
    sample_rate_max_hz: float = 5e6
    frequency_max_hz: float = 2e6


@dataclass(frozen=True)
class InstrumentConfig:
    """Everything of the virtual instrument that is not lever, sample or tip (SI units)."""

    limits: StageLimits = StageLimits()
    z_sensor_noise_m: float = 0.05e-9
    coarse_step_scatter: float = 0.1  # relative standard deviation of one coarse step
    start_gap_m: float = 40e-6  # tip-surface distance at zero Z extension before any coarse step
    drift_m_per_s: tuple[float, float] = (0.0, 0.0)
    xy_speed_m_per_s: float = 100e-6
    drive_m_per_v: float = 100e-9  # free peak amplitude at resonance per volt of drive
    phase_offset_deg: float = 0.0  # lock-in phase at the free resonance
    lockin_time_constant_s: float = 1e-4
    p_gain: float = 0.2  # Z metres per metre of amplitude error
    i_gain_per_s: float = 1500.0  # Z velocity per metre of amplitude error
    servo_oversample: int = 4
    tapping_sharpness: float = 6.0
    crash_depth_m: float = 20e-9  # a centre gap below minus this with the feedback off is a crash
    sum_min_v: float = 0.5  # the laser counts as lost below this sum signal
    detector: OpticalLever = OpticalLever()


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


@functools.lru_cache(maxsize=64)
def _closed_loop(dt_s: float, slope: float, kp: float, ki: float, tau_a: float, tau_l: float
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    # open loop L = slope (kp s + ki) / (s (1 + s tau_a)(1 + s tau_l)); Z/W = L / (1 + L),
    # E/W = slope s / (s (1 + s tau_a)(1 + s tau_l) + slope (kp s + ki))
    den = np.array([tau_a * tau_l, tau_a + tau_l, 1.0 + slope * kp, slope * ki])
    num_z, den_d, _ = cont2discrete((np.array([slope * kp, slope * ki]), den), dt_s, method="zoh")
    num_e, _, _ = cont2discrete((np.array([slope, 0.0]), den), dt_s, method="zoh")
    return np.ravel(num_z), np.ravel(num_e), np.ravel(den_d)


class VirtualMicroscope:
    """A simulated MFM: every reading is physics plus noise, every action costs virtual time.

    Parameters
    ----------
    lever : Lever
    sample : object following the ``Sample`` interface (topography_m, interaction, contact_force_n, expose)
    temperature_k : float
    config : InstrumentConfig
    rng : numpy.random.Generator
    clock : VirtualClock
    """

    def __init__(self, *, lever: Lever, sample, temperature_k: float, config: InstrumentConfig = InstrumentConfig(),
                 rng: np.random.Generator, clock: VirtualClock | None = None) -> None:
        self.lever = lever
        self.sample = sample
        self.temperature_k = temperature_k
        self.config = config
        self.detector = config.detector
        self.clock = clock or VirtualClock("fast")
        self._rng = rng
        lim = config.limits
        self.z = ZPiezo(range_m=lim.z_range_m, speed_max_m_per_s=lim.z_speed_max_m_per_s,
                        sensor_noise_m=config.z_sensor_noise_m)
        self.coarse = CoarseMotor(step_m=lim.coarse_step_m, scatter=config.coarse_step_scatter,
                                  travel_max_m=lim.coarse_travel_max_m)
        self.xy = XYScanner(range_m=lim.scan_size_max_m, drift_m_per_s=config.drift_m_per_s)
        self.k = lever.spring_constant_n_per_m
        self.f0 = lever.resonance_hz
        self.q = lever.quality_factor
        self.drive_on = False
        self.drive_frequency_hz = self.f0
        self.drive_amplitude_v = 0.0
        self.lockin_time_constant_s = config.lockin_time_constant_s
        self.feedback_on = False
        self.setpoint_v = 0.0
        self.p_gain = config.p_gain
        self.i_gain_per_s = config.i_gain_per_s
        self.bias_v = 0.0
        self.laser_fraction = 1.0
        self._faults: list[str] = []
        self._thermal: dict[float, tuple[ThermalMode, FlickerNoise]] = {}

    # ---- small physics helpers -----------------------------------------------------------------------
    @property
    def limits(self) -> StageLimits:
        return self.config.limits

    @property
    def volts_per_m(self) -> float:
        """Dynamic (mode-1) detector gain [V/m]."""
        return 1.0 / (CHI * self.detector.invols_m_per_v)

    def _drive_force_n(self) -> float:
        if not self.drive_on:
            return 0.0
        return self.k * self.config.drive_m_per_v * self.drive_amplitude_v / self.q

    def free_amplitude_m(self, force_gradient_n_per_m: np.ndarray | float = 0.0) -> np.ndarray | float:
        """Peak amplitude at the present drive, away from the surface (or with the given gradient)."""
        a, _ = driven_response(self.drive_frequency_hz, spring_constant_n_per_m=self.k, resonance_hz=self.f0,
                               quality_factor=self.q, force_gradient_n_per_m=force_gradient_n_per_m,
                               drive_force_n=self._drive_force_n())
        return a

    def _tapping(self, gap_m: np.ndarray | float, free_m: np.ndarray | float) -> np.ndarray:
        """Amplitude limited by the centre gap (soft minimum of free amplitude and gap)."""
        p = self.config.tapping_sharpness
        d = np.maximum(gap_m, 0.0)
        free = np.asarray(free_m, dtype=float)
        den = (d**p + free**p) ** (1.0 / p)
        return np.divide(d * free, den, out=np.zeros(np.broadcast(d, free).shape), where=den > 0)

    def _setpoint_gap_m(self, free_m: float, setpoint_m: float) -> float:
        """Centre gap at which the tapping amplitude equals the setpoint (inf if it never does)."""
        p = self.config.tapping_sharpness
        if setpoint_m <= 0 or free_m <= setpoint_m:
            return math.inf
        return setpoint_m * free_m / (free_m**p - setpoint_m**p) ** (1.0 / p)

    def _thermal_psd_m2_per_hz(self, frequency_hz: float) -> float:
        """Thermal displacement PSD of the point-mass oscillator plus detector white noise [m^2/Hz]."""
        u = frequency_hz / self.f0
        s_th = 2 * KB * self.temperature_k / (math.pi * self.k * self.f0 * self.q) / (
            (1 - u * u) ** 2 + (u / self.q) ** 2)
        s_det = (self.detector.white_noise_v_per_rthz / self.volts_per_m) ** 2
        return s_th + s_det

    def _surface_gap0_m(self) -> float:
        return self.config.start_gap_m - self.coarse.position_m

    def _here(self) -> tuple[np.ndarray, np.ndarray]:
        return self.xy.sample_frame(self.xy.x_m, self.xy.y_m, self.clock.now_s)

    def _height_here_m(self) -> float:
        x, y = self._here()
        return float(self.sample.topography_m(np.atleast_1d(x), np.atleast_1d(y))[0])

    def _centre_gap_m(self) -> float:
        return self._surface_gap0_m() - self.z.position_m - self._height_here_m()

    def _gradient_here(self, gap_m: float, amplitude_m: float) -> float:
        if not gap_m < _NEAR_M:
            return 0.0
        x, y = self._here()
        gap = max(gap_m, amplitude_m + 0.5e-9)
        inter = self.sample.interaction(np.atleast_1d(x), np.atleast_1d(y), np.atleast_1d(gap), bias_v=self.bias_v,
                                        amplitude_m=amplitude_m)
        return float(np.asarray(inter.force_gradient_n_per_m).ravel()[0])

    def _require_laser(self) -> None:
        if self.laser_fraction * self.detector.sum_v < self.config.sum_min_v:
            raise StageFault(LASER_LOST, f"sum signal {self.laser_fraction * self.detector.sum_v:g} V is below "
                                         f"the limit {self.config.sum_min_v:g} V: laser lost")

    def _fault(self, code: int, message: str) -> StageFault:
        self._faults.append(message)
        return StageFault(code, message)

    # ---- feedback equilibrium ------------------------------------------------------------------------
    def _settle(self) -> None:
        """With the feedback on, move Z to where the amplitude equals the setpoint (clipped to the range)."""
        if not self.feedback_on:
            return
        free = float(self.free_amplitude_m())
        d_sp = self._setpoint_gap_m(free, self.setpoint_v / self.volts_per_m)
        if math.isinf(d_sp):
            target = 0.0 if free < self.setpoint_v / self.volts_per_m else self.z.range_m
        else:
            target = self._surface_gap0_m() - self._height_here_m() - d_sp
        target = min(max(target, 0.0), self.z.range_m)
        self.clock.advance(abs(target - self.z.position_m) / self.z.speed_max_m_per_s)
        self.z.position_m = target

    @property
    def engaged(self) -> bool:
        """Feedback on and holding the setpoint with Z inside its range."""
        if not (self.feedback_on and self.drive_on):
            return False
        free = float(self.free_amplitude_m())
        d_sp = self._setpoint_gap_m(free, self.setpoint_v / self.volts_per_m)
        if math.isinf(d_sp):
            return False
        needed = self._surface_gap0_m() - self._height_here_m() - d_sp
        return 0.0 < needed < self.z.range_m

    def _check_crash(self) -> None:
        gap = self._centre_gap_m()
        if gap < -self.config.crash_depth_m:
            raise self._fault(TIP_CRASH, f"tip crashed: centre gap {gap:g} m is below the limit "
                                         f"{-self.config.crash_depth_m:g} m")

    # ---- signals -------------------------------------------------------------------------------------
    def read(self, channels: Sequence[str]) -> dict[str, float]:
        """Lock-in filtered values of the named channels (see :data:`CHANNELS`); one time constant passes."""
        unknown = [c for c in channels if c not in CHANNELS]
        if unknown:
            raise StageFault(UNKNOWN_CHANNEL, f"unknown channel {unknown[0]!r}; known: {', '.join(CHANNELS)}")
        if any(c != "sum_v" for c in channels):
            self._require_laser()
        self.clock.advance(self.lockin_time_constant_s)
        rng = self._rng
        out: dict[str, float] = {}
        need_dyn = any(c in channels for c in ("amplitude_v", "phase_deg", "frequency_shift_hz"))
        gap = self._centre_gap_m() if (need_dyn or "deflection_v" in channels) else math.inf
        if need_dyn:
            free = float(self.free_amplitude_m())
            fprime = self._gradient_here(gap, free) if free > 0 else 0.0
            driven, lag = driven_response(self.drive_frequency_hz, spring_constant_n_per_m=self.k,
                                          resonance_hz=self.f0, quality_factor=self.q,
                                          force_gradient_n_per_m=fprime, drive_force_n=self._drive_force_n())
            if self.engaged:  # the loop holds the amplitude at the setpoint, whatever shifts the resonance
                amp = self.setpoint_v / self.volts_per_m
            else:
                amp = float(self._tapping(gap, float(driven)))
            bw = 1.0 / (4.0 * self.lockin_time_constant_s)  # first-order low-pass, noise-equivalent bandwidth
            sigma = math.sqrt(2 * self._thermal_psd_m2_per_hz(self.drive_frequency_hz) * bw)
            amp_meas = math.hypot(amp + sigma * rng.standard_normal(), sigma * rng.standard_normal())
            if amp > 0:
                dphi = sigma / amp * rng.standard_normal()
            else:  # nothing to lock on to: the phase is noise
                dphi = rng.uniform(-math.pi, math.pi)
            out_phase = 90.0 - math.degrees(float(lag) + dphi) + self.config.phase_offset_deg
            shift = self.f0 * (math.sqrt(max(1 - fprime / self.k, 0.0)) - 1.0)
            shift += self.f0 / (2 * self.q) * dphi
            vals = {"amplitude_v": amp_meas * self.volts_per_m, "phase_deg": out_phase, "frequency_shift_hz": shift}
            out.update({c: vals[c] for c in channels if c in vals})
        if "deflection_v" in channels:
            static = 0.0
            if gap < _NEAR_M and not self.drive_on:
                x, y = self._here()
                force = self.sample.contact_force_n(float(x), float(y), np.atleast_1d(gap), bias_v=self.bias_v)
                static = float(np.asarray(force).ravel()[0]) / self.k
            thermal = math.sqrt(0.970688 * KB * self.temperature_k / self.k) * rng.standard_normal()
            bw = 1.0 / (4.0 * self.lockin_time_constant_s)
            white = self.detector.white_noise_v_per_rthz * math.sqrt(bw) * rng.standard_normal()
            out["deflection_v"] = float(self.detector.static_volts(static) + self.detector.dynamic_volts(thermal)
                                        + white) * self.laser_fraction
        if "sum_v" in channels:
            out["sum_v"] = self.laser_fraction * self.detector.sum_v * (1 + 1e-3 * rng.standard_normal())
        if "z_m" in channels:
            out["z_m"] = float(self.z.sensor_m(rng))
        return {c: out[c] for c in channels}

    def record_deflection(self, samples: int, rate_hz: float, *, chunk: int = 1 << 18) -> Iterator[np.ndarray]:
        """Raw deflection [V] at ``rate_hz``: thermal mode-1 motion, detector white and 1/f noise, and the
        drive's oscillation if the drive is on. Streams ``samples`` values in chunks; constant memory."""
        lim = self.limits
        if not 0 < rate_hz <= lim.sample_rate_max_hz:
            raise StageLimitError("sample rate", rate_hz, 0.0, lim.sample_rate_max_hz, "Hz")
        if samples < 0 or chunk < 1:
            raise StageFault(BAD_REQUEST, f"samples = {samples} must be >= 0 and chunk = {chunk} >= 1")
        self._require_laser()
        return self._record(int(samples), float(rate_hz), int(chunk))

    def _record(self, samples: int, rate_hz: float, chunk: int) -> Iterator[np.ndarray]:
        scale = self.volts_per_m
        if rate_hz not in self._thermal:
            white_m = self.detector.white_std_v(rate_hz) / scale
            # fast bit generators for the bulk noise, seeded from the injected one (reproducible); one stream
            # each, so the record does not depend on how it is chunked (a link may ask for smaller chunks)
            seeds = np.random.SeedSequence(int(self._rng.integers(2**63))).spawn(2)
            mode_rng, flicker_rng = (np.random.Generator(np.random.SFC64(s)) for s in seeds)
            mode = ThermalMode(stiffness_n_per_m=self.k / 0.970688, resonance_hz=self.f0, quality_factor=self.q,
                               temperature_k=self.temperature_k, rate_hz=rate_hz, rng=mode_rng,
                               white_noise_std_m=white_m, output_gain=scale)
            flicker = FlickerNoise(self.detector.flicker_v_per_rthz_at_1hz, rate_hz, flicker_rng)
            self._thermal = {rate_hz: (mode, flicker)}
        mode, flicker = self._thermal[rate_hz]
        sat = self.detector.saturation_v
        done = 0
        while done < samples:
            self._require_laser()
            n = min(chunk, samples - done)
            v = mode.next_chunk(n)
            if self.laser_fraction != 1.0:
                v *= self.laser_fraction
            flicker.add_to(v)
            if self.drive_on and self.drive_amplitude_v > 0:
                a = float(self.free_amplitude_m()) * scale
                _, lag = driven_response(self.drive_frequency_hz, spring_constant_n_per_m=self.k,
                                         resonance_hz=self.f0, quality_factor=self.q)
                t = self.clock.now_s + np.arange(n) / rate_hz
                v += a * np.cos(2 * np.pi * self.drive_frequency_hz * t - float(lag))
            if v.max() > sat or v.min() < -sat:
                self.detector.clip(v)
            self.clock.advance(n / rate_hz, step_s=1.0 / rate_hz)
            done += n
            yield v

    # ---- drive and lock-in ---------------------------------------------------------------------------
    def set_drive(self, frequency_hz: float, amplitude_v: float) -> None:
        lim = self.limits
        if not 0 < frequency_hz <= lim.frequency_max_hz:
            raise StageLimitError("drive frequency", frequency_hz, 0.0, lim.frequency_max_hz, "Hz")
        if not 0 <= amplitude_v <= lim.drive_max_v:
            raise StageLimitError("drive amplitude", amplitude_v, 0.0, lim.drive_max_v, "V")
        self.drive_on = True
        self.drive_frequency_hz = float(frequency_hz)
        self.drive_amplitude_v = float(amplitude_v)
        self._settle()
        self._check_crash()

    def drive_off(self) -> None:
        self.drive_on = False
        self.drive_amplitude_v = 0.0
        self._settle()

    def set_lockin_time_constant(self, seconds: float) -> None:
        if not 1e-6 <= seconds <= 10.0:
            raise StageLimitError("lock-in time constant", seconds, 1e-6, 10.0, "s")
        self.lockin_time_constant_s = float(seconds)

    def sweep(self, frequencies_hz: np.ndarray, amplitude_v: float, *, settle_s: float | None = None) -> SweepResult:
        """Drive at each frequency in turn; lock-in amplitude [V, peak] and phase [deg] with noise."""
        f = np.asarray(frequencies_hz, dtype=float)
        if f.ndim != 1 or f.size == 0:
            raise StageFault(BAD_REQUEST, f"sweep needs a 1-D array of frequencies, got shape {f.shape}")
        for value in (f.min(), f.max()):
            if not 0 < value <= self.limits.frequency_max_hz:
                raise StageLimitError("drive frequency", float(value), 0.0, self.limits.frequency_max_hz, "Hz")
        self.set_drive(float(f[0]), amplitude_v)
        self._require_laser()
        gap = self._centre_gap_m()
        free = float(self.free_amplitude_m())
        fprime = self._gradient_here(gap, free)
        amp, lag = driven_response(f, spring_constant_n_per_m=self.k, resonance_hz=self.f0, quality_factor=self.q,
                                   force_gradient_n_per_m=fprime, drive_force_n=self._drive_force_n())
        amp = self._tapping(gap, amp)
        bw = 1.0 / (4.0 * self.lockin_time_constant_s)
        u = f / self.f0
        s_th = 2 * KB * self.temperature_k / (math.pi * self.k * self.f0 * self.q) / ((1 - u * u) ** 2 + (u / self.q) ** 2)
        sigma = np.sqrt(2 * (s_th + (self.detector.white_noise_v_per_rthz / self.volts_per_m) ** 2) * bw)
        n1, n2 = self._rng.standard_normal((2, f.size))
        amp_meas = np.hypot(amp + sigma * n1, sigma * n2)
        phase = 90.0 - np.degrees(lag + np.arctan2(sigma * n2, amp + sigma * n1)) + self.config.phase_offset_deg
        settle = 5 * max(self.lockin_time_constant_s, 2 * self.q / (2 * math.pi * self.f0)) if settle_s is None \
            else float(settle_s)
        self.clock.advance(settle * f.size, step_s=settle)
        self.drive_frequency_hz = float(f[-1])
        self._settle()
        return SweepResult(f, amp_meas * self.volts_per_m, phase)

    # ---- motion --------------------------------------------------------------------------------------
    def move_z(self, z_m: float) -> None:
        """Move the Z piezo to extension ``z_m`` at the speed limit (switches nothing else)."""
        self.clock.advance(self.z.move_time_s(z_m))
        self.z.position_m = float(z_m)
        self._check_crash()

    def step_coarse(self, steps: int) -> None:
        """Coarse motor steps; positive approaches the sample. The feedback (if on) follows."""
        new = self.coarse.plan(int(steps), self._rng)
        self.clock.advance(abs(int(steps)) * self.coarse.step_time_s)
        self.coarse.position_m = new
        self._settle()
        self._check_crash()

    def move_xy(self, x_m: float, y_m: float) -> None:
        x, y = self.xy.check(x_m, y_m)
        self.clock.advance(math.hypot(x - self.xy.x_m, y - self.xy.y_m) / self.config.xy_speed_m_per_s)
        self.xy.move(x, y)
        self._settle()
        self._check_crash()

    def withdraw(self) -> None:
        """Feedback off and Z fully retracted. Always allowed, idempotent, never raises."""
        self.feedback_on = False
        self.clock.advance(self.z.withdraw_time_s(), interruptible=False)
        self.z.position_m = 0.0

    def set_feedback(self, enabled: bool, *, setpoint_v: float | None = None, p_gain: float | None = None,
                     i_gain: float | None = None) -> None:
        """Amplitude feedback on or off; ``setpoint_v`` [V, peak], ``p_gain`` [m/m], ``i_gain`` [1/s]."""
        if setpoint_v is not None:
            if not 0 < setpoint_v <= self.detector.saturation_v:
                raise StageLimitError("amplitude setpoint", setpoint_v, 0.0, self.detector.saturation_v, "V")
            self.setpoint_v = float(setpoint_v)
        if p_gain is not None:
            if not 0 <= p_gain <= 10:
                raise StageLimitError("proportional gain", p_gain, 0.0, 10.0, "m/m")
            self.p_gain = float(p_gain)
        if i_gain is not None:
            if not 0 < i_gain <= 1e7:
                raise StageLimitError("integral gain", i_gain, 0.0, 1e7, "1/s")
            self.i_gain_per_s = float(i_gain)
        if enabled and self.setpoint_v <= 0.0:
            raise StageFault(BAD_REQUEST, "amplitude feedback needs a setpoint: pass setpoint_v > 0 first")
        self.feedback_on = bool(enabled)
        self._settle()
        self._check_crash()

    def set_bias(self, bias_v: float) -> None:
        lim = self.limits.bias_max_v
        if not -lim <= bias_v <= lim:
            raise StageLimitError("tip bias", bias_v, -lim, lim, "V")
        self.bias_v = float(bias_v)

    def set_laser_fraction(self, fraction: float) -> None:
        """Fault injection: fraction of the laser reaching the detector (1 aligned, 0 lost)."""
        self.laser_fraction = min(max(float(fraction), 0.0), 1.0)

    def status(self) -> StageStatus:
        faults = list(self._faults)
        if self.laser_fraction * self.detector.sum_v < self.config.sum_min_v:
            faults.append("laser lost")
        return StageStatus(self.engaged, self.z.position_m, self.coarse.position_m, self.bias_v, self.drive_on,
                           self.drive_frequency_hz, self.drive_amplitude_v, self.feedback_on, tuple(faults))

    def clear_faults(self) -> None:
        self._faults.clear()

    # ---- imaging -------------------------------------------------------------------------------------
    def _loop(self, dt_s: float, slope: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Discrete closed loop of the amplitude feedback: Z from the surface, and the amplitude error.

        Continuous model: the amplitude follows the gap with slope ``slope`` through two first-order lags
        (the lever's amplitude response time 2Q/w0 and the lock-in), the PI controller Kp + Ki/s drives Z.
        Discretised exactly for a surface held over each servo sample (zero-order hold), so a loop that is
        stable in continuous time stays stable at any sample interval.
        """
        tau_a = 2 * self.q / (2 * math.pi * self.f0)
        return _closed_loop(round(dt_s, 15), round(slope, 12), self.p_gain, self.i_gain_per_s, tau_a,
                            self.lockin_time_constant_s)

    def scan_line(self, *, y_m: float, x_start_m: float, length_m: float, pixels: int, line_rate_hz: float,
                  passes: Sequence[tuple[float, float]] = ()) -> LineResult:
        """One line along x: a first pass under amplitude feedback, then each (lift_height_m, bias_v) pass
        retracing the recorded topography with the feedback off. Each pass (trace and retrace) takes
        1 / line_rate_hz; data are taken on the trace. Needs the stage engaged."""
        n = int(pixels)
        if not 2 <= n <= 65536:
            raise StageFault(BAD_REQUEST, f"pixels = {pixels} is outside [2, 65536]")
        if not 0 < line_rate_hz <= 1000.0:
            raise StageLimitError("line rate", line_rate_hz, 0.0, 1000.0, "Hz")
        self.xy.check(x_start_m, y_m)
        self.xy.check(x_start_m + length_m, y_m)
        for lift, bias in passes:
            if not 0 <= lift <= self.z.range_m:
                raise StageLimitError("lift height", lift, 0.0, self.z.range_m, "m")
            if not -self.limits.bias_max_v <= bias <= self.limits.bias_max_v:
                raise StageLimitError("tip bias", bias, -self.limits.bias_max_v, self.limits.bias_max_v, "V")
        self._require_laser()
        if not self.engaged:
            raise StageFault(NOT_ENGAGED, "scan_line needs the feedback on and holding the setpoint on the surface")
        cfg, rng = self.config, self._rng
        s = max(1, int(cfg.servo_oversample))
        dwell = 0.5 / (line_rate_hz * n)
        dt = dwell / s
        t0 = self.clock.now_s
        free = float(self.free_amplitude_m())
        sp = self.setpoint_v / self.volts_per_m
        d_sp = self._setpoint_gap_m(free, sp)
        p = cfg.tapping_sharpness
        slope = free ** (p + 1) / (d_sp**p + free**p) ** (1 + 1 / p)
        gap0 = self._surface_gap0_m()
        # first pass: the servo samples along the line
        idx = np.arange(n * s)
        xs = x_start_m + (idx + 0.5) * length_m / (n * s)
        xf, yf = self.xy.sample_frame(xs, y_m, t0 + (idx + 0.5) * dt)
        w = (gap0 - d_sp) - self.sample.topography_m(xf, np.broadcast_to(yf, xf.shape))
        num_z, num_e, den = self._loop(dt, slope)
        if np.max(np.abs(np.roots(den))) >= 1.0 and "feedback unstable" not in self._faults:
            self._faults.append("feedback unstable")
        u = w[0] + lfilter(num_z, den, w - w[0])
        u = np.clip(np.nan_to_num(u, nan=0.0, posinf=self.z.range_m, neginf=0.0), 0.0, self.z.range_m)
        gap_err = w - u  # centre gap minus the setpoint gap
        err_m = lfilter(num_e, den, w - w[0])  # the amplitude error as the lags let the controller see it
        u_px = u.reshape(n, s).mean(axis=1) + cfg.z_sensor_noise_m * rng.standard_normal(n)
        bw = 1.0 / (4 * self.lockin_time_constant_s + 2 * dwell)  # lock-in then pixel average (rule of thumb)
        sigma = math.sqrt(2 * self._thermal_psd_m2_per_hz(self.drive_frequency_hz) * bw)
        topography = (gap0 - d_sp) - u_px
        amp_err_v = (err_m.reshape(n, s).mean(axis=1) + sigma * rng.standard_normal(n)) * self.volts_per_m
        centre = d_sp + gap_err.reshape(n, s).mean(axis=1)
        x_px = x_start_m + (np.arange(n) + 0.5) * length_m / n
        x1, y1 = self.xy.sample_frame(x_px, y_m, t0 + (np.arange(n) + 0.5) * dwell)
        self.sample.expose(x1, np.broadcast_to(y1, x1.shape), np.maximum(centre - self._tapping(centre, free), 0.0))
        results: list[PassResult] = []
        if passes:
            results = self._second_passes(passes, u_px, x_px, y_m, t0, line_rate_hz, dwell, gap0, free, sigma)
        self.clock.advance((1 + len(passes)) / line_rate_hz, step_s=dt)  # an abort stops at a servo step
        self.xy.move(float(x_px[-1]), y_m)
        self._settle()
        return LineResult(topography, amp_err_v, results)

    def _second_passes(self, passes, u_px, x_px, y_m, t0, line_rate_hz, dwell, gap0, free, sigma):
        n, npass = x_px.size, len(passes)
        lifts = np.array([lp[0] for lp in passes], dtype=float)
        biases = np.array([lp[1] for lp in passes], dtype=float)
        z2 = u_px[None, :] - lifts[:, None]
        if z2.min() < 0.0:
            raise StageLimitError("z extension", float(z2.min()), 0.0, self.z.range_m, "m")
        starts = t0 + (np.arange(npass) + 1) / line_rate_hz
        x2, y2 = self.xy.sample_frame(np.broadcast_to(x_px, (npass, n)), y_m,
                                      starts[:, None] + (np.arange(n) + 0.5)[None, :] * dwell)
        y2 = np.broadcast_to(y2, x2.shape)
        gap = gap0 - z2 - self.sample.topography_m(x2, y2)
        fprime = np.zeros_like(gap)

        def evaluate(first: int) -> None:  # passes first.. in one call per distinct bias
            for b in np.unique(biases[first:]):
                rows = np.flatnonzero(biases == b)
                rows = rows[rows >= first]
                inter = self.sample.interaction(x2[rows], y2[rows], gap[rows], bias_v=float(b), amplitude_m=free)
                fprime[rows] = inter.force_gradient_n_per_m

        def response() -> tuple[np.ndarray, np.ndarray]:
            a, lg = driven_response(self.drive_frequency_hz, spring_constant_n_per_m=self.k, resonance_hz=self.f0,
                                    quality_factor=self.q, force_gradient_n_per_m=fprime,
                                    drive_force_n=self._drive_force_n())
            return self._tapping(gap, a), lg  # a lift too low for the amplitude ends in tapping

        evaluate(0)
        amp, lag = response()
        # the tip's field acts pass by pass: what one pass switches, the later passes of the line see
        for i in range(npass):
            if self.sample.expose(x2[i], y2[i], np.maximum(gap[i] - amp[i], 0.0)) and i + 1 < npass:
                evaluate(i + 1)
                amp, lag = response()
        shift = self.f0 * (np.sqrt(np.maximum(1 - fprime / self.k, 0.0)) - 1.0)
        # the amplitude's response time and the lock-in smooth the signals along the line
        for tau in (2 * self.q / (2 * math.pi * self.f0), self.lockin_time_constant_s):
            a = math.exp(-dwell / tau)
            for arr in (amp, lag, shift):
                arr[...] = lfilter([1 - a], [1.0, -a], arr, axis=-1, zi=a * arr[:, :1])[0]
        n1, n2 = self._rng.standard_normal((2, npass, n))
        inphase = amp + sigma * n1
        dphi = np.arctan2(sigma * n2, inphase)
        amp_v = np.hypot(inphase, sigma * n2) * self.volts_per_m
        phase = 90.0 - np.degrees(lag + dphi) + self.config.phase_offset_deg
        shift = shift + self.f0 / (2 * self.q) * dphi
        return [PassResult(float(lifts[i]), float(biases[i]), phase[i], amp_v[i], shift[i]) for i in range(npass)]

    def force_curve(self, z_stop_m: float, points: int) -> ForceCurveResult:
        """Extend Z from its present value to ``z_stop_m`` and back, feedback suspended, recording the static
        deflection [V] (InvOLS_static). The tip follows the stable branch: snap-in on approach, adhesion on
        retract (the lever equilibrium k d = F(gap) solved on a dense gap grid)."""
        z_stop = self.z.check(z_stop_m)
        if not 2 <= int(points) <= 100_000:
            raise StageFault(BAD_REQUEST, f"points = {points} is outside [2, 100000]")
        self._require_laser()
        was_on, self.feedback_on = self.feedback_on, False
        z0 = self.z.position_m
        x, y = self._here()
        base = self._surface_gap0_m() - self._height_here_m()
        z_app = np.linspace(z0, z_stop, int(points))
        t_app = base - z_app
        lo, hi = min(t_app.min(), -1e-9), t_app.max() + 1e-9
        grid = np.linspace(lo, hi, 4001)
        dense_lo, dense_hi = max(lo, -10e-9), min(hi, 30e-9)
        if dense_hi > dense_lo:
            grid = np.union1d(grid, np.linspace(dense_lo, dense_hi, 8001))
        force = np.asarray(self.sample.contact_force_n(float(x), float(y), grid, bias_v=self.bias_v), dtype=float)
        d0 = grid - force / self.k  # undeflected gap that puts the tip at each grid gap
        desc, cm = grid[::-1], np.minimum.accumulate(d0[::-1])
        i = np.clip(np.searchsorted(-cm, -t_app, side="left"), 0, grid.size - 1)
        d_app = desc[i]
        z_ret = z_app[::-1]
        t_ret = base - z_ret
        cmax = np.maximum.accumulate(d0)
        j = np.clip(np.searchsorted(cmax, t_ret, side="left"), 0, grid.size - 1)
        d_ret = grid[j]
        noise = self.detector.white_noise_v_per_rthz * math.sqrt(1 / (4 * self.lockin_time_constant_s))
        defl_app = self.detector.static_volts(d_app - t_app) + noise * self._rng.standard_normal(t_app.size)
        defl_ret = self.detector.static_volts(d_ret - t_ret) + noise * self._rng.standard_normal(t_ret.size)
        self.clock.advance(2 * abs(z_stop - z0) / self.z.speed_max_m_per_s)
        self.sample.expose(np.atleast_1d(x), np.atleast_1d(y), np.atleast_1d(max(float(d_app.min()), 0.0)))
        self.feedback_on = was_on
        self._settle()
        return ForceCurveResult(z_app, self.detector.clip(defl_app * self.laser_fraction), z_ret,
                                self.detector.clip(defl_ret * self.laser_fraction))
