"""The virtual microscope: lever, detector, positioners, drive and lock-in, feedback and two-pass lines.

The parts, each with its physics and sources: the drive and the lock-in (:mod:`simulated_stage.lockin`), the
amplitude feedback and its tapping model (:mod:`simulated_stage.feedback`), two-pass lines
(:mod:`simulated_stage.two_pass`), force curves (:mod:`simulated_stage.force_curve`), raw deflection records
(:mod:`simulated_stage.deflection_record`), the magnet under the sample (:mod:`simulated_stage.magnet`) and what
they return (:mod:`simulated_stage.results`). This module holds the state they share and the controller-like
methods: signals, drive, motion, feedback, status.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from simulated_stage.clock import VirtualClock
from simulated_stage.deflection_record import DeflectionRecorder
from simulated_stage.errors import BAD_REQUEST, LASER_LOST, TIP_CRASH, StageFault, StageLimitError
from simulated_stage.feedback import AmplitudeFeedback
from simulated_stage.force_curve import force_curve
from simulated_stage.lever import Lever
from simulated_stage.lockin import LockIn
from simulated_stage.magnet import Electromagnet, MagnetConfig, MagnetControl
from simulated_stage.optical_lever import OpticalLever
from simulated_stage.results import ForceCurveResult, LineResult, StageStatus, SweepResult
from simulated_stage.scanner import CoarseMotor, XYScanner, ZPiezo
from simulated_stage.signals import CHANNELS, NEAR_M, read_channels, sweep
from simulated_stage.two_pass import scan_line

__all__ = ["VirtualMicroscope", "StageLimits", "InstrumentConfig", "CHANNELS"]


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
    field_max_a_per_m: float = 800e3
    field_ramp_a_per_m_per_s: float = 50e3
    field_settle_s: float = 2.0


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
    field_noise_a_per_m: float = 50.0  # rms of one reading of the magnet's field sensor


class VirtualMicroscope(MagnetControl):
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
        self.rng = rng
        lim = config.limits
        self.z = ZPiezo(range_m=lim.z_range_m, speed_max_m_per_s=lim.z_speed_max_m_per_s,
                        sensor_noise_m=config.z_sensor_noise_m)
        self.coarse = CoarseMotor(step_m=lim.coarse_step_m, scatter=config.coarse_step_scatter,
                                  travel_max_m=lim.coarse_travel_max_m)
        self.xy = XYScanner(range_m=lim.scan_size_max_m, drift_m_per_s=config.drift_m_per_s)
        self.k = lever.spring_constant_n_per_m
        self.f0 = lever.resonance_hz
        self.q = lever.quality_factor
        self.lockin = LockIn(spring_constant_n_per_m=self.k, resonance_hz=self.f0, quality_factor=self.q,
                             temperature_k=temperature_k, detector=self.detector, drive_m_per_v=config.drive_m_per_v,
                             phase_offset_deg=config.phase_offset_deg, time_constant_s=config.lockin_time_constant_s)
        self.feedback = AmplitudeFeedback(p_gain=config.p_gain, i_gain_per_s=config.i_gain_per_s,
                                          tapping_sharpness=config.tapping_sharpness,
                                          servo_oversample=config.servo_oversample)
        self.bias_v = 0.0
        self.laser_fraction = 1.0
        self.faults: list[str] = []
        self._recorder = DeflectionRecorder(self)
        self.magnet = Electromagnet(MagnetConfig(lim.field_max_a_per_m, lim.field_ramp_a_per_m_per_s,
                                                 lim.field_settle_s, config.field_noise_a_per_m), self.clock)

    # ---- state the parts share -----------------------------------------------------------------------
    @property
    def limits(self) -> StageLimits:
        return self.config.limits

    @property
    def volts_per_m(self) -> float:
        """Dynamic (mode-1) detector gain [V/m]."""
        return self.lockin.volts_per_m

    def free_amplitude_m(self, force_gradient_n_per_m: np.ndarray | float = 0.0) -> np.ndarray | float:
        """Peak amplitude at the present drive, away from the surface (or with the given gradient)."""
        return self.lockin.response(force_gradient_n_per_m)[0]

    def surface_gap0_m(self) -> float:
        """Tip-surface distance at zero Z extension over the sample's zero height [m]."""
        return self.config.start_gap_m - self.coarse.position_m

    def here(self) -> tuple[np.ndarray, np.ndarray]:
        """The tip's position in the sample's frame (drift included)."""
        return self.xy.sample_frame(self.xy.x_m, self.xy.y_m, self.clock.now_s)

    def height_here_m(self) -> float:
        x, y = self.here()
        return float(self.sample.topography_m(np.atleast_1d(x), np.atleast_1d(y))[0])

    def centre_gap_m(self) -> float:
        return self.surface_gap0_m() - self.z.position_m - self.height_here_m()

    def gradient_here(self, gap_m: float, amplitude_m: float) -> float:
        if not gap_m < NEAR_M:
            return 0.0
        x, y = self.here()
        gap = max(gap_m, amplitude_m + 0.5e-9)
        inter = self.sample.interaction(np.atleast_1d(x), np.atleast_1d(y), np.atleast_1d(gap), bias_v=self.bias_v,
                                        amplitude_m=amplitude_m)
        return float(np.asarray(inter.force_gradient_n_per_m).ravel()[0])

    def require_laser(self) -> None:
        if self.laser_fraction * self.detector.sum_v < self.config.sum_min_v:
            raise StageFault(LASER_LOST, f"sum signal {self.laser_fraction * self.detector.sum_v:g} V is below "
                                         f"the limit {self.config.sum_min_v:g} V: laser lost")

    # ---- feedback equilibrium ------------------------------------------------------------------------
    def _setpoint_gap_m(self) -> tuple[float, float]:
        """The free amplitude and the centre gap at which the feedback holds the setpoint [m]."""
        free = float(self.free_amplitude_m())
        return free, self.feedback.setpoint_gap_m(free, self.feedback.setpoint_v / self.volts_per_m)

    def settle(self) -> None:
        """With the feedback on, move Z to where the amplitude equals the setpoint (clipped to the range)."""
        if not self.feedback.on:
            return
        free, d_sp = self._setpoint_gap_m()
        if math.isinf(d_sp):
            target = 0.0 if free < self.feedback.setpoint_v / self.volts_per_m else self.z.range_m
        else:
            target = self.surface_gap0_m() - self.height_here_m() - d_sp
        target = min(max(target, 0.0), self.z.range_m)
        self.clock.advance(abs(target - self.z.position_m) / self.z.speed_max_m_per_s)
        self.z.position_m = target

    @property
    def engaged(self) -> bool:
        """Feedback on and holding the setpoint with Z inside its range."""
        if not (self.feedback.on and self.lockin.on):
            return False
        _, d_sp = self._setpoint_gap_m()
        if math.isinf(d_sp):
            return False
        needed = self.surface_gap0_m() - self.height_here_m() - d_sp
        return 0.0 < needed < self.z.range_m

    def _check_crash(self) -> None:
        gap = self.centre_gap_m()
        if gap < -self.config.crash_depth_m:
            message = f"tip crashed: centre gap {gap:g} m is below the limit {-self.config.crash_depth_m:g} m"
            self.faults.append(message)
            raise StageFault(TIP_CRASH, message)

    # ---- signals -------------------------------------------------------------------------------------
    def read(self, channels: Sequence[str]) -> dict[str, float]:
        """Lock-in filtered values of the named channels (see :data:`CHANNELS`); one time constant passes."""
        return read_channels(self, channels)

    def record_deflection(self, samples: int, rate_hz: float, *, chunk: int = 1 << 18) -> Iterator[np.ndarray]:
        """Raw deflection [V] at ``rate_hz`` (:mod:`simulated_stage.deflection_record`), ``samples`` values in
        chunks; constant memory."""
        if not 0 < rate_hz <= self.limits.sample_rate_max_hz:
            raise StageLimitError("sample rate", rate_hz, 0.0, self.limits.sample_rate_max_hz, "Hz")
        if samples < 0 or chunk < 1:
            raise StageFault(BAD_REQUEST, f"samples = {samples} must be >= 0 and chunk = {chunk} >= 1")
        self.require_laser()
        return self._recorder.stream(int(samples), float(rate_hz), int(chunk))

    # ---- drive and lock-in ---------------------------------------------------------------------------
    def set_drive(self, frequency_hz: float, amplitude_v: float) -> None:
        lim = self.limits
        if not 0 < frequency_hz <= lim.frequency_max_hz:
            raise StageLimitError("drive frequency", frequency_hz, 0.0, lim.frequency_max_hz, "Hz")
        if not 0 <= amplitude_v <= lim.drive_max_v:
            raise StageLimitError("drive amplitude", amplitude_v, 0.0, lim.drive_max_v, "V")
        self.lockin.on = True
        self.lockin.frequency_hz = float(frequency_hz)
        self.lockin.amplitude_v = float(amplitude_v)
        self.settle()
        self._check_crash()

    def drive_off(self) -> None:
        self.lockin.on = False
        self.lockin.amplitude_v = 0.0
        self.settle()

    def set_lockin_time_constant(self, seconds: float) -> None:
        if not 1e-6 <= seconds <= 10.0:
            raise StageLimitError("lock-in time constant", seconds, 1e-6, 10.0, "s")
        self.lockin.time_constant_s = float(seconds)

    def sweep(self, frequencies_hz: np.ndarray, amplitude_v: float, *, settle_s: float | None = None) -> SweepResult:
        """Drive at each frequency in turn; lock-in amplitude [V, peak] and phase [deg] with noise."""
        return sweep(self, frequencies_hz, amplitude_v, settle_s=settle_s)

    # ---- motion --------------------------------------------------------------------------------------
    def move_z(self, z_m: float) -> None:
        """Move the Z piezo to extension ``z_m`` at the speed limit (switches nothing else)."""
        self.clock.advance(self.z.move_time_s(z_m))
        self.z.position_m = float(z_m)
        self._check_crash()

    def step_coarse(self, steps: int) -> None:
        """Coarse motor steps; positive approaches the sample. The feedback (if on) follows."""
        new = self.coarse.plan(int(steps), self.rng)
        self.clock.advance(abs(int(steps)) * self.coarse.step_time_s)
        self.coarse.position_m = new
        self.settle()
        self._check_crash()

    def move_xy(self, x_m: float, y_m: float) -> None:
        x, y = self.xy.check(x_m, y_m)
        self.clock.advance(math.hypot(x - self.xy.x_m, y - self.xy.y_m) / self.config.xy_speed_m_per_s)
        self.xy.move(x, y)
        self.settle()
        self._check_crash()

    def withdraw(self) -> None:
        """Feedback off and Z fully retracted. Always allowed, idempotent, never raises."""
        self.feedback.on = False
        self.clock.advance(self.z.withdraw_time_s(), interruptible=False)
        self.z.position_m = 0.0

    def set_feedback(self, enabled: bool, *, setpoint_v: float | None = None, p_gain: float | None = None,
                     i_gain: float | None = None) -> None:
        """Amplitude feedback on or off; ``setpoint_v`` [V, peak], ``p_gain`` [m/m], ``i_gain`` [1/s]."""
        self.feedback.configure(setpoint_v=setpoint_v, p_gain=p_gain, i_gain=i_gain,
                                saturation_v=self.detector.saturation_v)
        if enabled and self.feedback.setpoint_v <= 0.0:
            raise StageFault(BAD_REQUEST, "amplitude feedback needs a setpoint: pass setpoint_v > 0 first")
        self.feedback.on = bool(enabled)
        self.settle()
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
        faults = list(self.faults)
        if self.laser_fraction * self.detector.sum_v < self.config.sum_min_v:
            faults.append("laser lost")
        return StageStatus(self.engaged, self.z.position_m, self.coarse.position_m, self.bias_v, self.lockin.on,
                           self.lockin.frequency_hz, self.lockin.amplitude_v, self.feedback.on, tuple(faults))

    def clear_faults(self) -> None:
        self.faults.clear()

    # ---- imaging -------------------------------------------------------------------------------------
    def scan_line(self, *, y_m: float, x_start_m: float, length_m: float, pixels: int, line_rate_hz: float,
                  passes: Sequence[tuple[float, float]] = ()) -> LineResult:
        """One line along x: a first pass under amplitude feedback, then each (lift_height_m, bias_v) pass
        retracing the recorded topography with the feedback off (:mod:`simulated_stage.two_pass`). Each pass
        (trace and retrace) takes 1 / line_rate_hz; data are taken on the trace. Needs the stage engaged."""
        return scan_line(self, y_m=y_m, x_start_m=x_start_m, length_m=length_m, pixels=pixels,
                         line_rate_hz=line_rate_hz, passes=passes)

    def force_curve(self, z_stop_m: float, points: int) -> ForceCurveResult:
        """Extend Z from its present value to ``z_stop_m`` and back, feedback suspended, recording the static
        deflection [V] (:mod:`simulated_stage.force_curve`)."""
        return force_curve(self, z_stop_m, points)
