"""Benchmark runner: ``python tests/benchmarks/run.py [NAME ...]`` prints one JSON object.

Each ``bench_*.py`` here defines ``run() -> dict``. Benchmarks are not collected by the test run. A result may
list its targets under ``"targets"`` (``timing.target``: what, value, target, unit, met); the runner prints them
all as one table on stderr at the end, each value against its target, and gathers them under ``"targets"``.

Every benchmark runs in a process of its own (``run.py --one FILE``), so none inherits another's imports, warm
caches or memory. The last matters for whole-process figures: Linux counts in a child's peak resident memory the
memory of the process that started it (exec keeps the larger of the two), and in one runner process every
command had read 202 MiB, ``mfma --help`` included, after the benchmarks before it had grown the runner.
"""

from __future__ import annotations

import importlib.util
import json
import os
import platform
import subprocess
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
        t0 = time.perf_counter()
        try:
            done = subprocess.run([sys.executable, __file__, "--one", str(f)], stdout=subprocess.PIPE, text=True)
            if done.returncode != 0:
                raise RuntimeError(f"exit {done.returncode}")
            result = json.loads(done.stdout)
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


def one(path: str) -> int:
    """Run one benchmark file's ``run()`` in this process and print its result as JSON on stdout."""
    f = Path(path)
    spec = importlib.util.spec_from_file_location(f.stem, f)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    print(json.dumps(module.run(), default=float))
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(HERE.parents[1]))
    if sys.argv[1:2] == ["--one"]:
        raise SystemExit(one(sys.argv[2]))
    raise SystemExit(main(sys.argv[1:]))
