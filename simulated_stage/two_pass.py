"""Two-pass lines of the virtual microscope: a first pass under amplitude feedback records the topography, then
each second pass retraces it at a lift height and tip bias with the feedback off.

The first pass samples the servo ``servo_oversample`` times per pixel (:mod:`simulated_stage.feedback`); the
second passes evaluate every pixel of every pass in one interaction call per distinct bias, let the tip's
field act pass by pass (what one pass switches, the later passes of the line see), and smooth the signals by
the amplitude's response time and the lock-in (:mod:`simulated_stage.lockin`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from simulated_stage.errors import BAD_REQUEST, NOT_ENGAGED, StageFault, StageLimitError
from simulated_stage.results import LineResult, PassResult


def scan_line(scope, *, y_m: float, x_start_m: float, length_m: float, pixels: int, line_rate_hz: float,
              passes: Sequence[tuple[float, float]] = ()) -> LineResult:
    """One line along x on ``scope`` (a :class:`~simulated_stage.instrument.VirtualMicroscope`); see its
    ``scan_line``."""
    n = int(pixels)
    if not 2 <= n <= 65536:
        raise StageFault(BAD_REQUEST, f"pixels = {pixels} is outside [2, 65536]")
    if not 0 < line_rate_hz <= 1000.0:
        raise StageLimitError("line rate", line_rate_hz, 0.0, 1000.0, "Hz")
    scope.xy.check(x_start_m, y_m)
    scope.xy.check(x_start_m + length_m, y_m)
    for lift, bias in passes:
        if not 0 <= lift <= scope.z.range_m:
            raise StageLimitError("lift height", lift, 0.0, scope.z.range_m, "m")
        if not -scope.limits.bias_max_v <= bias <= scope.limits.bias_max_v:
            raise StageLimitError("tip bias", bias, -scope.limits.bias_max_v, scope.limits.bias_max_v, "V")
    scope.require_laser()
    if not scope.engaged:
        raise StageFault(NOT_ENGAGED, "scan_line needs the feedback on and holding the setpoint on the surface")
    fb, lockin, rng = scope.feedback, scope.lockin, scope.rng
    s = fb.oversample
    dwell = 0.5 / (line_rate_hz * n)
    dt = dwell / s
    t0 = scope.clock.now_s
    free = float(scope.free_amplitude_m())
    d_sp = fb.setpoint_gap_m(free, fb.setpoint_v / scope.volts_per_m)
    gap0 = scope.surface_gap0_m()
    # first pass: the servo samples along the line
    idx = np.arange(n * s)
    xs = x_start_m + (idx + 0.5) * length_m / (n * s)
    xf, yf = scope.xy.sample_frame(xs, y_m, t0 + (idx + 0.5) * dt)
    w = (gap0 - d_sp) - scope.sample.topography_m(xf, np.broadcast_to(yf, xf.shape))
    loop = fb.loop(dt, fb.gap_slope(free, d_sp), amplitude_time_s=lockin.amplitude_time_s,
                   lockin_time_constant_s=lockin.time_constant_s)
    if np.max(np.abs(np.roots(loop[2]))) >= 1.0 and "feedback unstable" not in scope.faults:
        scope.faults.append("feedback unstable")
    u, err_m = fb.track(loop, w, scope.z.range_m)  # the amplitude error as the lags let the controller see it
    gap_err = w - u  # centre gap minus the setpoint gap
    u_px = u.reshape(n, s).mean(axis=1) + scope.config.z_sensor_noise_m * rng.standard_normal(n)
    sigma = lockin.noise_sigma_m(lockin.bandwidth_hz(dwell))  # lock-in then pixel average
    topography = (gap0 - d_sp) - u_px
    amp_err_v = (err_m.reshape(n, s).mean(axis=1) + sigma * rng.standard_normal(n)) * scope.volts_per_m
    centre = d_sp + gap_err.reshape(n, s).mean(axis=1)
    x_px = x_start_m + (np.arange(n) + 0.5) * length_m / n
    x1, y1 = scope.xy.sample_frame(x_px, y_m, t0 + (np.arange(n) + 0.5) * dwell)
    scope.sample.expose(x1, np.broadcast_to(y1, x1.shape), np.maximum(centre - fb.tapping(centre, free), 0.0))
    results: list[PassResult] = []
    if passes:
        results = _second_passes(scope, passes, u_px, x_px, y_m, t0, line_rate_hz, dwell, gap0, free, sigma)
    scope.clock.advance((1 + len(passes)) / line_rate_hz, step_s=dt)  # an abort stops at a servo step
    scope.xy.move(float(x_px[-1]), y_m)
    scope.settle()
    return LineResult(topography, amp_err_v, results)


def _second_passes(scope, passes, u_px, x_px, y_m, t0, line_rate_hz, dwell, gap0, free, sigma):
    from scipy.signal import lfilter  # scipy.signal takes ~1 s to import: only when the stage simulates
    lockin = scope.lockin
    n, npass = x_px.size, len(passes)
    lifts = np.array([lp[0] for lp in passes], dtype=float)
    biases = np.array([lp[1] for lp in passes], dtype=float)
    z2 = u_px[None, :] - lifts[:, None]
    if z2.min() < 0.0:
        raise StageLimitError("z extension", float(z2.min()), 0.0, scope.z.range_m, "m")
    starts = t0 + (np.arange(npass) + 1) / line_rate_hz
    x2, y2 = scope.xy.sample_frame(np.broadcast_to(x_px, (npass, n)), y_m,
                                   starts[:, None] + (np.arange(n) + 0.5)[None, :] * dwell)
    y2 = np.broadcast_to(y2, x2.shape)
    gap = gap0 - z2 - scope.sample.topography_m(x2, y2)
    fprime = np.zeros_like(gap)

    def evaluate(first: int) -> None:  # passes first.. in one call per distinct bias
        for b in np.unique(biases[first:]):
            rows = np.flatnonzero(biases == b)
            rows = rows[rows >= first]
            inter = scope.sample.interaction(x2[rows], y2[rows], gap[rows], bias_v=float(b), amplitude_m=free)
            fprime[rows] = inter.force_gradient_n_per_m

    def response() -> tuple[np.ndarray, np.ndarray]:
        a, lg = lockin.response(fprime)
        return scope.feedback.tapping(gap, a), lg  # a lift too low for the amplitude ends in tapping

    evaluate(0)
    amp, lag = response()
    # the tip's field acts pass by pass: what one pass switches, the later passes of the line see
    for i in range(npass):
        if scope.sample.expose(x2[i], y2[i], np.maximum(gap[i] - amp[i], 0.0)) and i + 1 < npass:
            evaluate(i + 1)
            amp, lag = response()
    shift = lockin.resonance_shift_hz(fprime)
    # the amplitude's response time and the lock-in smooth the signals along the line
    for tau in (lockin.amplitude_time_s, lockin.time_constant_s):
        a = math.exp(-dwell / tau)
        for arr in (amp, lag, shift):
            arr[...] = lfilter([1 - a], [1.0, -a], arr, axis=-1, zi=a * arr[:, :1])[0]
    amp_m, dphi = lockin.readout(amp, sigma, scope.rng)
    phase = lockin.phase_deg(lag, dphi)
    shift = shift + lockin.noise_shift_hz(dphi)
    amp_v = amp_m * scope.volts_per_m
    return [PassResult(float(lifts[i]), float(biases[i]), phase[i], amp_v[i], shift[i]) for i in range(npass)]
