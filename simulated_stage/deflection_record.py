"""Raw deflection records of the virtual microscope: thermal mode-1 motion (exactly sampled), detector white
and 1/f noise, and the drive's oscillation when the drive is on; streamed in chunks with constant memory."""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from simulated_stage.optical_lever import MODE1_DISPLACEMENT_FACTOR, FlickerNoise
from simulated_stage.thermal_mode import ThermalMode


class DeflectionRecorder:
    """Streams the deflection [V] of ``scope`` (a :class:`~simulated_stage.instrument.VirtualMicroscope`).

    The noise generators of the last sampling rate are kept, so a record continues where the last one ended.
    """

    def __init__(self, scope) -> None:
        self._scope = scope
        self._thermal: dict[float, tuple[ThermalMode, FlickerNoise]] = {}

    def _generators(self, rate_hz: float) -> tuple[ThermalMode, FlickerNoise]:
        scope = self._scope
        if rate_hz not in self._thermal:
            scale = scope.volts_per_m
            white_m = scope.detector.white_std_v(rate_hz) / scale
            # fast bit generators for the bulk noise, seeded from the injected one (reproducible); one stream
            # each, so the record does not depend on how it is chunked (a link may ask for smaller chunks)
            seeds = np.random.SeedSequence(int(scope.rng.integers(2**63))).spawn(2)
            mode_rng, flicker_rng = (np.random.Generator(np.random.SFC64(s)) for s in seeds)
            # modal stiffness referred to the end displacement: k / 0.971 (Butt & Jaschke 1995)
            mode = ThermalMode(stiffness_n_per_m=scope.k / MODE1_DISPLACEMENT_FACTOR, resonance_hz=scope.f0,
                               quality_factor=scope.q, temperature_k=scope.temperature_k, rate_hz=rate_hz,
                               rng=mode_rng, white_noise_std_m=white_m, output_gain=scale)
            flicker = FlickerNoise(scope.detector.flicker_v_per_rthz_at_1hz, rate_hz, flicker_rng)
            self._thermal = {rate_hz: (mode, flicker)}
        return self._thermal[rate_hz]

    def stream(self, samples: int, rate_hz: float, chunk: int) -> Iterator[np.ndarray]:
        scope = self._scope
        mode, flicker = self._generators(rate_hz)
        sat = scope.detector.saturation_v
        lockin = scope.lockin
        done = 0
        while done < samples:
            scope.require_laser()
            n = min(chunk, samples - done)
            v = mode.next_chunk(n)
            if scope.laser_fraction != 1.0:
                v *= scope.laser_fraction
            flicker.add_to(v)
            if lockin.on and lockin.amplitude_v > 0:
                a = float(scope.free_amplitude_m()) * scope.volts_per_m
                _, lag = lockin.response()
                t = scope.clock.now_s + np.arange(n) / rate_hz
                v += a * np.cos(2 * np.pi * lockin.frequency_hz * t - float(lag))
            if v.max() > sat or v.min() < -sat:
                scope.detector.clip(v)
            scope.clock.advance(n / rate_hz, step_s=1.0 / rate_hz)
            done += n
            yield v
