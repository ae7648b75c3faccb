"""Thermal record and scan-line speed of the simulated stage (fast pace).

``run()`` returns: samples per second and the real-time factor of a 2 MS/s deflection record (the full
chain: thermal mode, detector white and 1/f noise, volts), the peak traced memory of a long record streamed
in chunks, and the CPU time of a 256-pixel line with 7 second passes on the default scenario.
"""

from __future__ import annotations

import os
import time
import tracemalloc

import numpy as np

from simulated_stage.scenario import build_microscope, load_scenario

RATE_HZ = 2e6


def _engage(vm) -> None:
    vm.set_drive(vm.f0, 0.2)
    setpoint = 0.7 * float(vm.free_amplitude_m()) * vm.volts_per_m
    for _ in range(100):
        vm.set_feedback(True, setpoint_v=setpoint)
        if vm.engaged:
            return
        vm.withdraw()
        vm.step_coarse(int(0.8 * vm.limits.z_range_m / vm.limits.coarse_step_m))
    raise RuntimeError("no surface found")


def run() -> dict:
    vm = build_microscope(load_scenario("default"), seed=1)
    for _ in vm.record_deflection(1 << 18, RATE_HZ):  # warm-up: builds the filters
        pass
    samples = 1 << 24  # 8.4 s of signal
    t0, c0 = time.perf_counter(), time.process_time()
    total = 0.0
    for chunk in vm.record_deflection(samples, RATE_HZ):
        total += float(chunk[0])
    elapsed, cpu = time.perf_counter() - t0, time.process_time() - c0
    long_samples = 1 << 25  # 16.8 s at 2 MS/s: 268 MB if held in memory
    tracemalloc.start()
    for chunk in vm.record_deflection(long_samples, RATE_HZ):
        pass
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    line_vm = build_microscope(load_scenario("default"), seed=2)
    _engage(line_vm)
    passes = [(h * 1e-9, 0.0) for h in (10, 20, 30, 40, 60, 80, 100)]
    lines = 32
    for j in range(lines):  # warm the sample's caches as a real series would
        line_vm.scan_line(y_m=-2e-6 + j * 4e-6 / lines, x_start_m=-2e-6, length_m=4e-6, pixels=256,
                          line_rate_hz=1.0, passes=passes)
    c0 = time.process_time()
    for j in range(lines):
        line_vm.scan_line(y_m=-2e-6 + j * 4e-6 / lines, x_start_m=-2e-6, length_m=4e-6, pixels=256,
                          line_rate_hz=1.0, passes=passes)
    line_cpu = (time.process_time() - c0) / lines
    return {
        "rate_hz": RATE_HZ,
        "samples": samples,
        "samples_per_s": samples / elapsed,
        "realtime_factor": samples / RATE_HZ / elapsed,
        "realtime_factor_cpu": samples / RATE_HZ / cpu,  # less sensitive to other load on the machine
        "load_average_1min": os.getloadavg()[0],
        "long_record_samples": long_samples,
        "long_record_peak_traced_mib": peak / 2**20,
        "line_256px_7passes_cpu_ms": line_cpu * 1e3,
        "series_256_lines_cpu_s": line_cpu * 256,
        "checksum": float(np.float64(total)),
    }
