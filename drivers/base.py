"""The controller interface: what a driver must offer so that the assistant can run a microscope.

A lab that wants to use its own controller implements :class:`Controller` (a few hundred lines for a
typical SCPI or vendor-library wrapper) and registers it under a URL scheme (see ``drivers.registry``).

Conventions
-----------
* Every quantity is SI (m, s, Hz, V, N/m, K); phase is in degrees, as instruments report it.
* ``z_m`` is the Z piezo *extension towards the sample*: 0 is fully retracted, larger values bring the tip
  closer. ``withdraw()`` retracts to 0.
* Phase sign: the reported second-pass phase is ``phase_deg = -(lag - 90)``, so an attractive force
  gradient (F' = dF/dz > 0 with z the tip-sample gap) gives a *negative* phase, which images show dark.
* Methods that move or energise anything check the hard ``limits`` and raise
  :class:`drivers.errors.LimitExceeded` instead of clipping silently.
"""

from __future__ import annotations

import abc
import enum
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np


class Capability(str, enum.Enum):
    """Optional abilities a controller declares; procedures branch on these, never on ``hasattr``."""

    THERMAL_RECORD = "thermal_record"  # record_deflection at a high sample rate
    DRIVE_SWEEP = "drive_sweep"  # native sweep(); else the procedures step set_drive + read
    TWO_PASS_LINE = "two_pass_line"  # native scan_line(); else a generic fallback in the procedures
    BIAS = "bias"  # set_bias
    COARSE_MOTOR = "coarse_motor"  # step_coarse
    Z_SENSOR = "z_sensor"  # closed-loop Z readback in read("z_m")
    FORCE_CURVE = "force_curve"  # force_curve() for contact sensitivity
    FREQUENCY_SHIFT = "frequency_shift"  # second passes also report frequency_shift_hz
    APPLIED_FIELD = "applied_field"  # an electromagnet under the sample: set_field, read_field


@dataclass(frozen=True)
class ControllerInfo:
    """Identity of the controller, as ``*IDN?`` reports it."""

    maker: str
    model: str
    serial: str
    firmware: str


@dataclass(frozen=True)
class Limits:
    """Hard limits of the instrument. The software refuses anything outside them."""

    z_range_m: float = 10e-6  # Z piezo travel, 0 .. z_range_m
    z_speed_max_m_per_s: float = 20e-6
    bias_max_v: float = 10.0  # |bias| limit
    drive_max_v: float = 2.0  # drive amplitude limit
    coarse_travel_max_m: float = 2e-3  # total coarse travel towards the sample from the start position
    coarse_step_m: float = 50e-9  # nominal size of one coarse step (not a limit: the approach plans with it)
    scan_size_max_m: float = 90e-6
    sample_rate_max_hz: float = 5e6
    frequency_max_hz: float = 2e6
    field_max_a_per_m: float = 0.0  # |applied field| limit of the magnet (0: no magnet)
    field_ramp_a_per_m_per_s: float = 10e3  # how fast the magnet's field may change
    field_settle_s: float = 1.0  # wait after a ramp before the field counts as steady


@dataclass(frozen=True)
class SecondPass:
    """One second pass of a scan line: retrace the topography at ``lift_height_m`` with tip bias ``bias_v``."""

    lift_height_m: float
    bias_v: float = 0.0


@dataclass(frozen=True)
class LineSpec:
    """One scan line: a topography pass under amplitude feedback, then each second pass in order.

    The line runs along x (the fast axis) from ``x_start_m`` over ``length_m`` at slow-axis position ``y_m``.
    """

    y_m: float
    x_start_m: float
    length_m: float
    pixels: int
    line_rate_hz: float
    passes: tuple[SecondPass, ...] = ()


@dataclass
class PassData:
    """The signals of one second pass, each an array of ``pixels`` values."""

    lift_height_m: float
    bias_v: float
    phase_deg: np.ndarray
    amplitude_v: np.ndarray
    frequency_shift_hz: np.ndarray | None = None


@dataclass
class LineData:
    """Result of :meth:`Controller.scan_line`: first-pass topography and the second passes in order."""

    topography_m: np.ndarray
    amplitude_error_v: np.ndarray
    passes: list[PassData] = field(default_factory=list)


@dataclass(frozen=True)
class SweepData:
    """A drive sweep: lock-in amplitude and phase at each drive frequency."""

    frequency_hz: np.ndarray
    amplitude_v: np.ndarray
    phase_deg: np.ndarray


@dataclass(frozen=True)
class ForceCurve:
    """Deflection against Z extension, approach then retract."""

    z_m: np.ndarray
    deflection_v: np.ndarray
    retract_z_m: np.ndarray
    retract_deflection_v: np.ndarray


@dataclass(frozen=True)
class Status:
    """A snapshot of the instrument's state."""

    engaged: bool  # amplitude feedback on and the tip tracking the surface
    z_m: float  # Z piezo extension
    coarse_position_m: float  # coarse motor travel towards the sample from its start
    bias_v: float
    drive_on: bool
    drive_frequency_hz: float
    drive_amplitude_v: float
    feedback_on: bool
    faults: tuple[str, ...] = ()

    @property
    def safe(self) -> bool:
        """Tip withdrawn, drive off and bias zero: the state every failure must end in."""
        return (not self.engaged) and (not self.feedback_on) and self.z_m == 0.0 and (not self.drive_on) and (
            self.bias_v == 0.0
        )


#: Channel names that :meth:`Controller.read` understands at least.
CHANNELS = ("deflection_v", "sum_v", "amplitude_v", "phase_deg", "z_m", "frequency_shift_hz")


class Controller(abc.ABC):
    """Abstract microscope controller. Synchronous; one caller at a time, except :meth:`abort`, which any
    thread may call at any moment.

    Subclasses set ``info``, ``capabilities`` and ``limits`` and implement the abstract methods. Optional
    methods raise :class:`drivers.errors.CapabilityMissing` unless the matching capability is declared.
    """

    #: URL schemes this class handles, e.g. ``("sim",)``; read by the registry.
    schemes: tuple[str, ...] = ()

    info: ControllerInfo
    capabilities: frozenset[Capability]
    limits: Limits
    #: Axis of the applied field (``Capability.APPLIED_FIELD``): "z" is out of plane, +z away from the sample.
    #: The only axis the procedures support so far; an in-plane magnet would declare "x" or "y".
    field_axis: str = "z"

    @classmethod
    @abc.abstractmethod
    def from_url(cls, url: str, **options: object) -> "Controller":
        """Open a controller from its URL (the scheme already matched ``schemes``)."""

    # ---- signals -------------------------------------------------------------------------------------
    @abc.abstractmethod
    def read(self, channels: Sequence[str]) -> dict[str, float]:
        """Read instantaneous (lock-in filtered) values of the named channels, see :data:`CHANNELS`."""

    def record_deflection(self, samples: int, rate_hz: float, *, chunk: int = 1 << 18) -> Iterator[np.ndarray]:
        """Yield the raw deflection signal in volts, ``samples`` in all, in chunks of at most ``chunk``.

        Needs :attr:`Capability.THERMAL_RECORD`. Memory stays constant whatever ``samples`` is.
        """
        raise self._missing(Capability.THERMAL_RECORD)

    # ---- drive and lock-in ---------------------------------------------------------------------------
    @abc.abstractmethod
    def set_drive(self, frequency_hz: float, amplitude_v: float) -> None:
        """Drive the lever at ``frequency_hz`` with ``amplitude_v`` (volts to the shake piezo)."""

    @abc.abstractmethod
    def drive_off(self) -> None:
        """Stop driving the lever. Always allowed; idempotent."""

    @abc.abstractmethod
    def set_lockin_time_constant(self, seconds: float) -> None:
        """Set the lock-in output filter time constant."""

    def sweep(self, frequencies_hz: np.ndarray, amplitude_v: float, *, settle_s: float | None = None) -> SweepData:
        """Drive at each frequency in turn and record amplitude and phase. Needs :attr:`Capability.DRIVE_SWEEP`.

        The amplitude and every frequency meet the limits of :meth:`set_drive`."""
        raise self._missing(Capability.DRIVE_SWEEP)

    # ---- motion ---------------------------------------------------------------------------------------
    @abc.abstractmethod
    def move_z(self, z_m: float) -> None:
        """Move the Z piezo to extension ``z_m`` (absolute), at no more than the speed limit."""

    def step_coarse(self, steps: int) -> None:
        """Coarse motor: positive steps approach the sample. Needs :attr:`Capability.COARSE_MOTOR`.

        A move that would take the coarse position past ``limits.coarse_travel_max_m`` raises
        :class:`drivers.errors.LimitExceeded` before the motor moves."""
        raise self._missing(Capability.COARSE_MOTOR)

    @abc.abstractmethod
    def move_xy(self, x_m: float, y_m: float) -> None:
        """Move the scanner to (x, y)."""

    @abc.abstractmethod
    def withdraw(self) -> None:
        """Feedback off, Z fully retracted. Always allowed, idempotent, never raises on a withdrawn stage."""

    # ---- feedback -------------------------------------------------------------------------------------
    @abc.abstractmethod
    def set_feedback(self, enabled: bool, *, setpoint_v: float | None = None,
                     p_gain: float | None = None, i_gain: float | None = None) -> None:
        """Switch amplitude feedback on or off; optionally change its setpoint and gains."""

    # ---- imaging --------------------------------------------------------------------------------------
    def scan_line(self, spec: LineSpec) -> LineData:
        """Scan one line natively: topography then the second passes. Needs :attr:`Capability.TWO_PASS_LINE`.

        A line beyond the scan size, or a pass's bias beyond ``limits.bias_max_v`` or lift height outside the Z
        range, is refused before the line starts. A pass's bias holds during that pass only: when the line returns,
        the bias is back at the value :meth:`set_bias` last set."""
        raise self._missing(Capability.TWO_PASS_LINE)

    def force_curve(self, z_stop_m: float, points: int) -> ForceCurve:
        """Extend Z from its present value to ``z_stop_m`` (within ``[0, limits.z_range_m]``) and back, ``points``
        values in each array. Needs :attr:`Capability.FORCE_CURVE`."""
        raise self._missing(Capability.FORCE_CURVE)

    # ---- bias, state ----------------------------------------------------------------------------------
    def set_bias(self, bias_v: float) -> None:
        """Set the tip bias. Needs :attr:`Capability.BIAS`; setting 0 V is always allowed."""
        if bias_v == 0.0:
            return
        raise self._missing(Capability.BIAS)

    def set_field(self, field_a_per_m: float) -> None:
        """Ramp the applied field to ``field_a_per_m`` [A/m] along the magnet's axis and return once it has
        settled (ramp at ``limits.field_ramp_a_per_m_per_s``, then ``limits.field_settle_s``).

        Needs :attr:`Capability.APPLIED_FIELD`; setting 0 is always allowed. The magnet's axis is a property of
        the instrument (out-of-plane, +z away from the sample, for the magnets supported so far).
        """
        if field_a_per_m == 0.0:
            return
        raise self._missing(Capability.APPLIED_FIELD)

    def read_field(self) -> float:
        """The applied field as measured now [A/m] (a Hall probe or the coil current times its calibration).

        Needs :attr:`Capability.APPLIED_FIELD`.
        """
        raise self._missing(Capability.APPLIED_FIELD)

    @abc.abstractmethod
    def status(self) -> Status:
        """A snapshot of the instrument's state."""

    @abc.abstractmethod
    def close(self) -> None:
        """Release the link. Does not change the instrument's state beyond what the link needs."""

    def probe_hint(self) -> dict[str, float] | None:
        """Nominal data of the mounted probe that the controller happens to know (e.g. from a chip ID):
        any of ``length_m``, ``width_m``, ``resonance_hz``, ``spring_constant_n_per_m``, and ``temperature_k``
        if the instrument has a sensor for the air around the lever. None if unknown.
        Nominal means the maker's number, never a calibration."""
        return None

    # ---- safety ---------------------------------------------------------------------------------------
    def abort(self) -> None:
        """Stop whatever runs now and make the stage safe; return once it is safe.

        The one method that may be called from another thread while a call is in flight (the withdraw key of
        a user interface, Ctrl-C, a server's watchdog). The interrupted call raises
        :class:`drivers.errors.Aborted`. Afterwards the tip is withdrawn, the drive off, the bias 0 V and any
        applied field 0 (the steps of :meth:`make_safe`, each attempted even if one fails). Idempotent: on a
        stage that is already safe and idle it returns at once. It must not wait for a long call (a scan line,
        a sweep, a record) to finish: drivers whose calls take long override this so that it interrupts them
        (``mfma drivers check`` times it). This default only makes the stage safe, which is enough for a
        driver whose every call is short.
        """
        self.make_safe()

    def zero_applied_field(self) -> None:
        """Bring an applied (electromagnet) field to zero. Part of :meth:`make_safe` and :meth:`abort`.

        With :attr:`Capability.APPLIED_FIELD`, ``set_field(0.0)`` (the magnet's ramp and settle); nothing to do
        for a controller without a magnet.
        """
        if Capability.APPLIED_FIELD in getattr(self, "capabilities", ()):
            self.set_field(0.0)

    def make_safe(self) -> None:
        """Withdraw, drive off, bias zero and, with a magnet, field zero: each attempted even if an earlier one
        fails."""
        errors: list[BaseException] = []
        for action in safe_steps(self):
            try:
                action()
            except Exception as exc:  # keep going: every step that can succeed must
                errors.append(exc)
        if errors:
            raise errors[0]

    # ---- helpers --------------------------------------------------------------------------------------

    def has(self, capability: Capability) -> bool:
        return capability in self.capabilities

    def _missing(self, capability: Capability) -> Exception:
        from drivers.errors import CapabilityMissing

        return CapabilityMissing(f"{type(self).__name__} does not offer {capability.value}")

    def __enter__(self) -> "Controller":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def safe_steps(controller: object) -> list:
    """The actions that leave a stage safe, in order: withdraw, drive off, bias 0 V, applied field 0."""
    steps = [controller.withdraw, controller.drive_off, lambda: controller.set_bias(0.0)]  # type: ignore[attr-defined]
    zero_field = getattr(controller, "zero_applied_field", None)
    if callable(zero_field):
        steps.append(zero_field)
    return steps
