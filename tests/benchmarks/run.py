"""Benchmark runner: ``python tests/benchmarks/run.py [NAME ...]`` prints one JSON object.

Each ``bench_*.py`` here defines ``run() -> dict``. Benchmarks are not collected by the test run.
"""

from __future__ import annotations

import importlib.util
import json
import platform
import sys
import time
from pathlib import Path

HERE = Path(__file__).parent


def main(names: list[str]) -> int:
    results: dict[str, object] = {"python": platform.python_version(), "machine": platform.machine()}
    files = sorted(HERE.glob("bench_*.py"))
    if names:
        files = [f for f in files if f.stem.removeprefix("bench_") in names or f.stem in names]
    for f in files:
        spec = importlib.util.spec_from_file_location(f.stem, f)
        module = importlib.util.module_from_spec(spec)
        t0 = time.perf_counter()
        try:
            spec.loader.exec_module(module)
            results[f.stem.removeprefix("bench_")] = module.run()
        except Exception as exc:  # report and go on: one broken benchmark must not hide the rest
            results[f.stem.removeprefix("bench_")] = {"error": f"{type(exc).__name__}: {exc}"}
        sys.stderr.write(f"{f.stem}: {time.perf_counter() - t0:.1f} s\n")
    print(json.dumps(results, indent=2, default=float))
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(HERE.parents[1]))
    raise SystemExit(main(sys.argv[1:]))
