"""CLI start-up: ``mfma --help`` against ``python -c "import numpy, scipy.signal"`` (target: within 2x)."""

from __future__ import annotations

import statistics
import subprocess
import sys
import time


def _time(cmd: list[str], repeats: int = 7) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        subprocess.run(cmd, capture_output=True, check=True)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def run() -> dict:
    help_s = _time([sys.executable, "-m", "assistant", "--help"])
    ref_s = _time([sys.executable, "-c", "import numpy, scipy.signal"])
    return {"mfma_help_s": help_s, "import_numpy_scipy_signal_s": ref_s, "ratio": help_s / ref_s, "target_ratio": 2.0}
