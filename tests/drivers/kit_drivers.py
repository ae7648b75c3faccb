"""A small simulated stage for the conformance kit's tests, and drivers that each break one promise of the
controller interface (on purpose) on top of the simulated driver.

The stage: the default lever, a 3 µm stripe sample at 20 nm pixels (cheap field tables) and the surface 4 µm
below the retracted tip, so the kit's approach finds it with the Z piezo alone; realtime pace, so that the
kit's timing checks mean something. Its magnet (invented values) takes 0.15 s, ramp and settling, to set the kit's
40 kA/m test field and 0.25 s to reverse it (the ramp the kit aborts after 0.1 s): short enough for the suite;
``magnet="fast"`` (for drivers that set fields they should not) or ``"none"`` change that.
"""

from __future__ import annotations

import dataclasses
import math
import threading
import time

import numpy as np

from drivers.base import Capability, Controller, ForceCurve, Limits, SecondPass
from drivers.errors import ControllerFault, LimitExceeded
from drivers.simulated import SimulatedController, _mapped
from simulated_stage.scenario import Scenario

KIT_SCENARIO = """
name = "kit"
[instrument]
start_gap_um = START_GAP_UM
MAGNET
[sample]
pattern = "stripes"
period_nm = 400.0
extent_um = 3.0
pixel_nm = 20.0
"""
#: [instrument] lines of the magnet: max field [kA/m], ramp [kA/m/s], settling [s]
MAGNETS = {"kit": (800.0, 400.0, 0.05), "fast": (800.0, 1e4, 0.01), "none": (0.0, 50.0, 0.0)}


def kit_scenario(*, start_gap_um: float = 4.0, magnet: str = "kit") -> str:
    top, ramp, settle = MAGNETS[magnet]
    lines = (f"magnet_max_ka_per_m = {top}\nmagnet_ramp_ka_per_m_per_s = {ramp}\n"
             f"magnet_settle_s = {settle}")
    return KIT_SCENARIO.replace("START_GAP_UM", f"{start_gap_um}").replace("MAGNET", lines)


def kit_controller(cls: type[SimulatedController] = SimulatedController, *, stage=None, seed: int = 3,
                   start_gap_um: float = 4.0, magnet: str = "kit"):
    """A simulated controller (or a broken subclass) at realtime pace; pass ``stage`` to reuse one.
    ``start_gap_um``: the surface below the retracted tip (the kit's motion level wants more than the Z range);
    ``magnet``: a key of :data:`MAGNETS`."""
    if stage is None:
        text = kit_scenario(start_gap_um=start_gap_um, magnet=magnet)
        return cls.from_url("sim://?pace=realtime", scenario=Scenario.from_text(text), seed=seed)
    return cls(stage, seed=seed)


class ClipsBias(SimulatedController):
    """Clips the bias to its limit instead of refusing."""

    def set_bias(self, bias_v):
        lim = self.limits.bias_max_v
        super().set_bias(min(max(bias_v, -lim), lim))


class DriveLimitAsValueError(SimulatedController):
    """Refuses an out-of-range drive with a bare ValueError: not on the error tree."""

    def set_drive(self, frequency_hz, amplitude_v):
        if not 0 <= amplitude_v <= self.limits.drive_max_v:
            raise ValueError("drive too large")
        super().set_drive(frequency_hz, amplitude_v)


class SecondWithdrawRaises(SimulatedController):
    """Raises when withdraw() comes twice in a row."""

    _last_was_withdraw = False

    def withdraw(self):
        if self._last_was_withdraw:
            raise ControllerFault(7, "already withdrawn")
        super().withdraw()
        self._last_was_withdraw = True

    def drive_off(self):
        self._last_was_withdraw = False
        super().drive_off()


class DeclaresSweepItLacks(SimulatedController):
    """Declares drive_sweep but keeps the interface's refusing sweep()."""

    sweep = Controller.sweep


class LimitsInNanometres(SimulatedController):
    """Reports the lengths of its limits in nm (and speeds in nm/s) as if they were metres."""

    @property
    def limits(self):
        lim = self._limits_m
        return Limits(**{**lim.__dict__, "z_range_m": lim.z_range_m * 1e9, "z_speed_max_m_per_s":
                         lim.z_speed_max_m_per_s * 1e9, "scan_size_max_m": lim.scan_size_max_m * 1e9})

    @limits.setter
    def limits(self, value):
        self._limits_m = value


class IgnoresAbort(SimulatedController):
    """abort() makes the stage safe but does not stop the call in flight."""

    def abort(self):
        self.stage.withdraw()
        self.stage.drive_off()
        self.stage.set_bias(0.0)


class AcceptsNaNBias(SimulatedController):
    """A bias check written as `abs(v) > limit`, which NaN passes."""

    def set_bias(self, bias_v):
        if abs(bias_v) > self.limits.bias_max_v:
            super().set_bias(bias_v)  # the stage refuses
        self.stage.bias_v = float(bias_v)


class UndeclaredSweepNotClean(SimulatedController):
    """Leaves drive_sweep undeclared, but sweep() fails with a plain NotImplementedError."""

    capabilities = frozenset(Capability) - {Capability.DRIVE_SWEEP}

    def sweep(self, frequencies_hz, amplitude_v, *, settle_s=None):
        raise NotImplementedError("no sweeps here")


class ReadsPhaseAsFloat32(SimulatedController):
    """read() returns a numpy float32 for the phase (not a float)."""

    def read(self, channels):
        out = super().read(channels)
        if "phase_deg" in out:
            out["phase_deg"] = np.float32(out["phase_deg"])
        return out


class ClipsZ(SimulatedController):
    """Clips a Z target to the range instead of refusing (only a motion-level check sees it)."""

    def move_z(self, z_m):
        if not math.isnan(z_m):
            z_m = min(max(z_m, 0.0), self.limits.z_range_m)
        super().move_z(z_m)


class IgnoresZSpeed(SimulatedController):
    """Jumps the Z piezo to its target instead of moving at the speed limit."""

    def move_z(self, z_m):
        if not 0 <= z_m <= self.limits.z_range_m:
            raise LimitExceeded("z_m", z_m, 0.0, self.limits.z_range_m, "m")
        with self._lock:
            self.stage.z.position_m = float(z_m)


class ClipsField(SimulatedController):
    """Clips the applied field to the magnet's limit instead of refusing (and sets it)."""

    def set_field(self, field_a_per_m):
        lim = self.limits.field_max_a_per_m
        if math.isfinite(field_a_per_m):
            field_a_per_m = min(max(field_a_per_m, -lim), lim)
        super().set_field(field_a_per_m)


class KeepsFieldOnSafe(SimulatedController):
    """make_safe() and abort() forget the magnet: its field step does nothing."""

    def zero_applied_field(self):
        pass


class SweepClipsAmplitude(SimulatedController):
    """Clips a sweep's amplitude to the drive limit instead of refusing it (set_drive refuses as it should)."""

    def sweep(self, frequencies_hz, amplitude_v, *, settle_s=None):
        lim = self.limits.drive_max_v
        return super().sweep(frequencies_hz, min(max(amplitude_v, 0.0), lim), settle_s=settle_s)


class MakeSafeLeavesZ(SimulatedController):
    """make_safe() switches the drive off and sets the bias and the field to 0 but forgets the withdraw; its
    abort() withdraws as it should."""

    def make_safe(self):
        self.drive_off()
        self.set_bias(0.0)
        self.zero_applied_field()

    def abort(self):
        self.stage.clock.interrupt()
        with self._lock:
            self.stage.clock.resume()
            Controller.make_safe(self)


class FieldJumps(SimulatedController):
    """Sets the magnet's field at once (limits checked) instead of ramping it at the magnet's rate and settling."""

    def set_field(self, field_a_per_m):
        lim = self.limits.field_max_a_per_m
        if not (math.isfinite(field_a_per_m) and abs(field_a_per_m) <= lim):
            raise LimitExceeded("applied field", field_a_per_m, -lim, lim, "A/m")
        with self._lock:
            self.stage.magnet.field_a_per_m = float(field_a_per_m)


class CoarseIgnoresAbort(SimulatedController):
    """Counts out a coarse move without looking for abort(): the motor runs to the end of the move, and abort()
    returns only then."""

    @_mapped
    def step_coarse(self, steps):
        stage = self.stage
        new = stage.coarse.plan(int(steps), stage.rng)
        stage.clock.advance(abs(int(steps)) * stage.coarse.step_time_s, interruptible=False)
        stage.coarse.position_m = new


class CoarseRunsOn(SimulatedController):
    """Takes a move past the travel without a word, and abort() does not reach the motor: it runs on for 3 s (as
    far as the tests let it: the position does not change)."""

    def step_coarse(self, steps):
        lim = self.limits
        if self.status().coarse_position_m + int(steps) * lim.coarse_step_m <= lim.coarse_travel_max_m:
            super().step_coarse(steps)
            return
        time.sleep(3.0)


class ForceCurveClipsZ(SimulatedController):
    """Clips the end of a force curve to the Z range instead of refusing it."""

    def force_curve(self, z_stop_m, points):
        return super().force_curve(min(max(z_stop_m, 0.0), self.limits.z_range_m), points)


class ForceCurveInNanometres(SimulatedController):
    """Returns the Z of a force curve in nm."""

    def force_curve(self, z_stop_m, points):
        c = super().force_curve(z_stop_m, points)
        return ForceCurve(c.z_m * 1e9, c.deflection_v, c.retract_z_m * 1e9, c.retract_deflection_v)


class AbortWaitsForForceCurve(SimulatedController):
    """abort() waits for a force curve in flight to finish before it makes the stage safe (it stops other calls)."""

    _curve_done: threading.Event | None = None

    def force_curve(self, z_stop_m, points):
        self._curve_done = threading.Event()
        try:
            return super().force_curve(z_stop_m, points)
        finally:
            self._curve_done.set()

    def abort(self):
        if self._curve_done is not None:
            self._curve_done.wait()
        super().abort()


class ClipsPassBias(SimulatedController):
    """Clips the bias of each second pass to the limit instead of refusing the line."""

    def scan_line(self, spec):
        lim = self.limits.bias_max_v
        passes = tuple(SecondPass(p.lift_height_m, min(max(p.bias_v, -lim), lim)) for p in spec.passes)
        return super().scan_line(dataclasses.replace(spec, passes=passes))


class LeavesPassBias(SimulatedController):
    """Leaves the last second pass's bias on the tip when the line returns, so the next line's first pass, on the
    surface, runs biased."""

    def scan_line(self, spec):
        data = super().scan_line(spec)
        if spec.passes:
            self.set_bias(spec.passes[-1].bias_v)
        return data


class CoarsePastTravel(SimulatedController):
    """Runs the coarse motor up to its end stop instead of refusing a move past the travel: the steps beyond the
    end are dropped without a word (it stops 1 % of the remaining travel short of the end, so that the simulated
    motor's step scatter never refuses the move in its place)."""

    def step_coarse(self, steps):
        lim = self.limits
        room = int(0.99 * (lim.coarse_travel_max_m - self.status().coarse_position_m) / lim.coarse_step_m)
        super().step_coarse(min(int(steps), room))


#: broken driver -> the level that shows it, the stage it runs on (``signals``: near the surface, fast magnet;
#: ``motion``: room to move, no magnet; ``motion_magnet``: room to move, the kit magnet) and the checks that must fail:
#: the check of the promise broken first, then those that fail because of it (a clipped bias also takes an infinite one;
#: a sweep that is not there can neither refuse its limits nor be aborted; a Z move that does not take time is over
#: before it can be aborted, and so is a field that jumps; a move past the coarse travel is not asked for where an abort
#: cannot stop the coarse motor; an abort is a make-safe; a failed check on the surface leaves the tip withdrawn, so the
#: checks after it that need it there are not run; ``None``: a stage of its own, at realtime pace)
BROKEN = {
    ClipsBias: ("signals", "signals", {"safety.bias_limit", "safety.nonfinite"}),
    DriveLimitAsValueError: ("signals", "signals", {"safety.drive_limits", "safety.nonfinite"}),
    SecondWithdrawRaises: ("signals", "signals", {"safety.withdraw_twice"}),
    DeclaresSweepItLacks: ("signals", "signals", {"signals.capabilities_declared", "signals.sweep",
                                                  "safety.sweep_limits", "safety.abort_sweep"}),
    LimitsInNanometres: ("signals", "signals", {"identity.limits"}),
    IgnoresAbort: ("signals", "signals", {"safety.abort_sweep", "safety.abort_record"}),
    AcceptsNaNBias: ("signals", "signals", {"safety.nonfinite"}),
    UndeclaredSweepNotClean: ("signals", "signals", {"signals.capabilities_undeclared"}),
    ReadsPhaseAsFloat32: ("signals", "signals", {"signals.read"}),
    ClipsField: ("signals", "signals", {"field.limits"}),
    ClipsZ: ("motion", "motion", {"motion.z_limit_high", "safety.z_limit_low", "motion.nonfinite"}),
    IgnoresZSpeed: ("motion", "motion", {"motion.z_move", "motion.withdraw_wins"}),
    KeepsFieldOnSafe: ("motion", "motion_magnet", {"field.make_safe", "field.abort"}),
    CoarsePastTravel: ("motion", "motion", {"motion.coarse_travel"}),
    FieldJumps: ("motion", "motion_magnet", {"field.ramp_rate", "field.abort"}),
    MakeSafeLeavesZ: ("motion", "motion", {"motion.safe_from_extended"}),
    SweepClipsAmplitude: ("signals", "signals", {"safety.sweep_limits"}),
    CoarseIgnoresAbort: ("motion", "motion", {"motion.abort_coarse", "motion.coarse_travel"}),
    ForceCurveClipsZ: ("motion", "motion", {"motion.force_curve_limits"}),
    ForceCurveInNanometres: ("motion", "motion", {"motion.force_curve"}),
    AbortWaitsForForceCurve: ("motion", "motion", {"motion.abort_force_curve"}),
    ClipsPassBias: ("motion", "motion", {"motion.line_limits"}),
    LeavesPassBias: ("engaged", None, {"engaged.biased_line", "engaged.abort_mid_line"}),  # a stage of its own
}
