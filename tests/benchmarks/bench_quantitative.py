"""Quantitative MFM on 256 x 256: TTF calibration (pattern refinement, windowed fit, bootstrap bias correction,
point-probe fit) plus a field map (Wiener deconvolution, 64 Monte Carlo draws). Target: both together under 1 s,
peak memory under 1 GiB. Times are the minimum over repeats (medians too); memory is the peak traced by
tracemalloc (numpy's allocations included) during one calibration plus one map."""

from __future__ import annotations

import statistics
import time
import tracemalloc

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from assistant.analysis.quantitative import calibrate_tip, reconstruct_field  # noqa: E402
from tests.analysis.quantitative.synthetic import make_image  # noqa: E402
from timing import target  # noqa: E402

TIP = dict(moment_a_m2=1e-16, monopole_a_m=-3e-9, offset_m=30e-9)


def _images():
    ref = make_image(n=256, oversample=2, pixel_m=10e-9, period_m=200e-9, ms=6e5, thickness_m=12e-9,
                     height_m=20e-9, noise_n_per_m=1e-4, seed=1, crop=(512, 85, 128), **TIP)
    sam = make_image(n=256, oversample=2, pixel_m=10e-9, period_m=350e-9, ms=9e5, thickness_m=20e-9,
                     height_m=30e-9, noise_n_per_m=1e-4, seed=101, crop=(512, 40, 90), **TIP)
    return ref, sam


def _calibrate(ref):
    return calibrate_tip(ref.gradient_n_per_m, pixel_m=10e-9, ms_a_per_m=6e5, thickness_m=12e-9, plane_m=20e-9)


def _map(cal, sam):
    return reconstruct_field(sam.gradient_n_per_m, pixel_m=10e-9, plane_m=30e-9, ring_k_per_m=cal.transfer.k_per_m,
                             ttf_n_per_a=cal.ttf_n_per_a, ttf_std_n_per_a=cal.ttf_unc_n_per_a,
                             band_k_per_m=cal.transfer.band_k_per_m, ring_correlation=cal.ring_correlation,
                             ms_rel_std=0.05, thickness_m=12e-9, thickness_std_m=0.6e-9, draws=64)


def run() -> dict:
    ref, sam = _images()
    cal = _calibrate(ref)          # warm-up: imports, FFT plans
    _map(cal, sam)
    t_cal, t_map = [], []
    for _ in range(3):
        t0 = time.perf_counter()
        cal = _calibrate(ref)
        t1 = time.perf_counter()
        _map(cal, sam)
        t2 = time.perf_counter()
        t_cal.append(t1 - t0)
        t_map.append(t2 - t1)
    tracemalloc.start()
    _map(_calibrate(ref), sam)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    total = min(a + b for a, b in zip(t_cal, t_map))
    return {"image": "256 x 256", "calibration_s": min(t_cal), "calibration_median_s": statistics.median(t_cal),
            "field_map_s": min(t_map), "field_map_median_s": statistics.median(t_map), "total_s": total,
            "peak_memory_mib": peak / 2**20, "target_met": total < 1.0 and peak < 2**30,
            "targets": [target("TTF calibration + field map 256^2 (median of 3)",
                               statistics.median(a + b for a, b in zip(t_cal, t_map)), 1.0, "s"),
                        target("TTF calibration + field map 256^2: peak memory", peak / 2**20, 1024.0, "MiB")]}
