"""Benchmark runner: ``python tests/benchmarks/run.py [NAME ...]`` prints one JSON object.

Each ``bench_*.py`` here defines ``run() -> dict``. Benchmarks are not collected by the test run. A result may
list its targets under ``"targets"`` (``timing.target``: what, value, target, unit, met); the runner prints them
all as one table on stderr at the end, each value against its target, and gathers them under ``"targets"``.
"""

from __future__ import annotations

import importlib.util
import json
import os
import platform
import sys
import time
from pathlib import Path

HERE = Path(__file__).parent


def main(names: list[str]) -> int:
    results: dict[str, object] = {"python": platform.python_version(), "machine": platform.machine(),
                                  "cpus": os.cpu_count(), "load_average_1min_start": os.getloadavg()[0]}
    table: list[dict] = []
    files = sorted(HERE.glob("bench_*.py"))
    if names:
        files = [f for f in files if f.stem.removeprefix("bench_") in names or f.stem in names]
    for f in files:
        spec = importlib.util.spec_from_file_location(f.stem, f)
        module = importlib.util.module_from_spec(spec)
        t0 = time.perf_counter()
        try:
            spec.loader.exec_module(module)
            result = module.run()
            results[f.stem.removeprefix("bench_")] = result
            table += [{"bench": f.stem.removeprefix("bench_"), **t} for t in result.get("targets", [])]
        except Exception as exc:  # report and go on: one broken benchmark must not hide the rest
            results[f.stem.removeprefix("bench_")] = {"error": f"{type(exc).__name__}: {exc}"}
            table.append({"bench": f.stem.removeprefix("bench_"), "what": f"{f.stem}: failed ({type(exc).__name__})",
                          "value": float("nan"), "target": float("nan"), "unit": "", "met": False})
        sys.stderr.write(f"{f.stem}: {time.perf_counter() - t0:.1f} s\n")
    results["load_average_1min_end"] = os.getloadavg()[0]
    results["targets"] = table
    sys.stderr.write(targets_table(table, results))
    print(json.dumps(results, indent=2, default=float))
    return 0


def targets_table(table: list[dict], results: dict) -> str:
    """Every target as one line: the value, the target, the ratio of the two and whether it holds."""
    if not table:
        return ""
    width = max(len(t["what"]) for t in table) + 2
    lines = [f"\ntargets (load average {results['load_average_1min_start']:.1f} at the start, "
             f"{results['load_average_1min_end']:.1f} at the end; {results['cpus']} cpus)"]
    for t in table:
        unit = t["unit"]
        measured = t["value"] == t["value"]  # NaN: not measured
        value = f"{t['value']:.4g} {unit}".strip() if measured else "-"
        limit = f"{t['target']:.4g} {unit}".strip()
        share = f"{t['value'] / t['target']:6.3g} of it" if measured and t["target"] else " " * 12
        status = "met" if t["met"] else ("MISSED" if measured else "not measured")
        lines.append(f"  {t['what']:<{width}} {value:>12}  target <= {limit:<10} {share}  {status}")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    sys.path.insert(0, str(HERE.parents[1]))
    raise SystemExit(main(sys.argv[1:]))
