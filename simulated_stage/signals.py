"""Readings of the virtual microscope: one lock-in filtered value of each channel, and drive sweeps.

The physics of the drive and of the lock-in noise is in :mod:`simulated_stage.lockin`. A single reading draws
its phase error as a small angle of its own (sigma / A times a normal draw), a sweep and a two-pass line the
in-phase and quadrature noise of every point.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from simulated_stage.errors import BAD_REQUEST, UNKNOWN_CHANNEL, StageFault, StageLimitError
from simulated_stage.optical_lever import MODE1_DISPLACEMENT_FACTOR
from simulated_stage.results import SweepResult
from simulated_stage.thermal_mode import KB

CHANNELS = ("deflection_v", "sum_v", "amplitude_v", "phase_deg", "z_m", "frequency_shift_hz")
NEAR_M = 5e-6  # beyond this centre gap the tip-sample interaction is not evaluated (it is below any noise)


def read_channels(scope, channels: Sequence[str]) -> dict[str, float]:
    """Lock-in filtered values of the named channels (see :data:`CHANNELS`); one time constant passes."""
    unknown = [c for c in channels if c not in CHANNELS]
    if unknown:
        raise StageFault(UNKNOWN_CHANNEL, f"unknown channel {unknown[0]!r}; known: {', '.join(CHANNELS)}")
    if any(c != "sum_v" for c in channels):
        scope.require_laser()
    lockin, rng = scope.lockin, scope.rng
    scope.clock.advance(lockin.time_constant_s)
    out: dict[str, float] = {}
    need_dyn = any(c in channels for c in ("amplitude_v", "phase_deg", "frequency_shift_hz"))
    gap = scope.centre_gap_m() if (need_dyn or "deflection_v" in channels) else math.inf
    if need_dyn:
        free = float(scope.free_amplitude_m())
        fprime = scope.gradient_here(gap, free) if free > 0 else 0.0
        driven, lag = lockin.response(fprime)
        if scope.engaged:  # the loop holds the amplitude at the setpoint, whatever shifts the resonance
            amp = scope.feedback.setpoint_v / scope.volts_per_m
        else:
            amp = float(scope.feedback.tapping(gap, float(driven)))
        sigma = lockin.noise_sigma_m(lockin.bandwidth_hz())
        amp_meas = math.hypot(amp + sigma * rng.standard_normal(), sigma * rng.standard_normal())
        # one reading: a small-angle phase error of its own draw; nothing to lock on to, the phase is noise
        dphi = sigma / amp * rng.standard_normal() if amp > 0 else rng.uniform(-math.pi, math.pi)
        vals = {"amplitude_v": amp_meas * scope.volts_per_m, "phase_deg": lockin.phase_deg(float(lag), dphi),
                "frequency_shift_hz": lockin.resonance_shift_hz(fprime) + lockin.noise_shift_hz(dphi)}
        out.update({c: vals[c] for c in channels if c in vals})
    if "deflection_v" in channels:
        static = 0.0
        if gap < NEAR_M and not lockin.on:
            x, y = scope.here()
            force = scope.sample.contact_force_n(float(x), float(y), np.atleast_1d(gap), bias_v=scope.bias_v)
            static = float(np.asarray(force).ravel()[0]) / scope.k
        thermal = math.sqrt(MODE1_DISPLACEMENT_FACTOR * KB * scope.temperature_k / scope.k) * rng.standard_normal()
        white = scope.detector.white_noise_v_per_rthz * math.sqrt(lockin.bandwidth_hz()) * rng.standard_normal()
        out["deflection_v"] = float(scope.detector.static_volts(static) + scope.detector.dynamic_volts(thermal)
                                    + white) * scope.laser_fraction
    if "sum_v" in channels:
        out["sum_v"] = scope.laser_fraction * scope.detector.sum_v * (1 + 1e-3 * rng.standard_normal())
    if "z_m" in channels:
        out["z_m"] = float(scope.z.sensor_m(rng))
    return {c: out[c] for c in channels}


def sweep(scope, frequencies_hz: np.ndarray, amplitude_v: float, *, settle_s: float | None = None) -> SweepResult:
    """Drive at each frequency in turn; lock-in amplitude [V, peak] and phase [deg] with noise."""
    f = np.asarray(frequencies_hz, dtype=float)
    if f.ndim != 1 or f.size == 0:
        raise StageFault(BAD_REQUEST, f"sweep needs a 1-D array of frequencies, got shape {f.shape}")
    for value in (f.min(), f.max()):
        if not 0 < value <= scope.limits.frequency_max_hz:
            raise StageLimitError("drive frequency", float(value), 0.0, scope.limits.frequency_max_hz, "Hz")
    scope.set_drive(float(f[0]), amplitude_v)
    scope.require_laser()
    lockin = scope.lockin
    gap = scope.centre_gap_m()
    free = float(scope.free_amplitude_m())
    amp, lag = lockin.response(scope.gradient_here(gap, free), frequency_hz=f)
    amp = scope.feedback.tapping(gap, amp)
    sigma = lockin.noise_sigma_m(lockin.bandwidth_hz(), frequency_hz=f)
    amp_meas, dphi = lockin.readout(amp, sigma, scope.rng)
    phase = lockin.phase_deg(lag, dphi)
    settle = 5 * max(lockin.time_constant_s, lockin.amplitude_time_s) if settle_s is None else float(settle_s)
    scope.clock.advance(settle * f.size, step_s=settle)
    lockin.frequency_hz = float(f[-1])
    scope.settle()
    return SweepResult(f, amp_meas * scope.volts_per_m, phase)
