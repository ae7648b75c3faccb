"""Helpers of the benchmarks: whole processes timed side by side, and targets in one form for ``run.py``.

A whole process is timed from just before ``Popen`` to just after the child is reaped (``time.perf_counter``);
its CPU seconds and peak resident memory are the kernel's own accounting of that child (``os.wait4``). Two
commands run in turn, A B A B ..., after warm-up runs that are not counted, and the ratio A/B is taken pair by
pair, so that a change of load on a shared machine falls on both alike; the figure quoted is the median.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import time
from pathlib import Path


def mfma_command() -> list[str]:
    """The installed ``mfma`` script beside this interpreter (what a user runs), else ``python -m assistant``."""
    script = Path(sys.executable).with_name("mfma")
    return [str(script)] if script.exists() else [sys.executable, "-m", "assistant"]


def run_once(cmd: list[str], *, cwd: str | None = None, env: dict | None = None) -> dict:
    """One whole process: wall seconds, CPU seconds, peak resident MiB and the exit code."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            cwd=cwd, env=env)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    return {"wall_s": wall, "cpu_s": usage.ru_utime + usage.ru_stime, "peak_mib": usage.ru_maxrss / 1024.0,
            "exit": proc.returncode}


def side_by_side(a: list[str], b: list[str] | None, *, runs: int = 5, warmup: int = 1, cwd: str | None = None,
                 env: dict | None = None) -> dict:
    """Medians of A (and B, and of the pairwise ratio A/B) over ``runs`` interleaved runs."""
    for _ in range(warmup):
        run_once(a, cwd=cwd, env=env)
        if b is not None:
            run_once(b, cwd=cwd, env=env)
    ra, rb = [], []
    for _ in range(runs):
        ra.append(run_once(a, cwd=cwd, env=env))
        if b is not None:
            rb.append(run_once(b, cwd=cwd, env=env))
    bad = [r["exit"] for r in ra + rb if r["exit"] != 0]
    if bad:
        raise RuntimeError(f"a timed command failed (exit {bad[0]}): {' '.join(a)}"
                           + (f" / {' '.join(b)}" if b else ""))
    out = {"runs": runs, "a_wall_s": statistics.median(r["wall_s"] for r in ra),
           "a_wall_min_s": min(r["wall_s"] for r in ra), "a_wall_max_s": max(r["wall_s"] for r in ra),
           "a_cpu_s": statistics.median(r["cpu_s"] for r in ra), "a_peak_mib": max(r["peak_mib"] for r in ra)}
    if b is not None:
        ratios = [x["wall_s"] / y["wall_s"] for x, y in zip(ra, rb)]
        out.update({"b_wall_s": statistics.median(r["wall_s"] for r in rb), "b_cpu_s":
                    statistics.median(r["cpu_s"] for r in rb), "b_peak_mib": max(r["peak_mib"] for r in rb),
                    "ratio": statistics.median(ratios), "ratio_min": min(ratios), "ratio_max": max(ratios)})
    return out


def target(what: str, value: float, limit: float, unit: str = "") -> dict:
    """One target for ``run.py``'s table: ``value`` must stay at or under ``limit`` (NaN: not measured)."""
    return {"what": what, "value": float(value), "target": float(limit), "unit": unit,
            "met": bool(value <= limit)}


def load_average() -> float:
    return os.getloadavg()[0]
