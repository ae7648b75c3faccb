"""The terminal UI's first screen (target: drawn within 1 s of start), measured in a real terminal.

``mfma tui`` on the simulated stage starts in a detached tmux session of 120 x 40 cells on a server of its own (a
socket in a temporary folder, so no one else's sessions are touched); the pane is read every 20 ms until the first
screen is there: the tab bar (``1 Probe``) and the footer's withdraw key. The time is from just before tmux is
asked to start the command to the first read that shows both; the median of the runs is the figure. The session is
then killed with its server (the simulated stage has nothing to withdraw).

``MFMA_BENCH_RUNS`` sets the number of runs (default 3).
"""

from __future__ import annotations

import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from timing import load_average, mfma_command, target  # noqa: E402

TARGET_S = 1.0
MARKS = ("1 Probe", "WITHDRAW")


def _first_screen(socket: Path, command: str, timeout_s: float = 30.0) -> float:
    # a server of its own per run (its socket in the benchmark's temporary folder): a server that is still
    # shutting down cannot refuse the next session, and nothing is left behind
    tmux = ["tmux", "-S", str(socket), "-f", "/dev/null"]
    name = "tui"
    t0 = time.perf_counter()
    subprocess.run(tmux + ["new-session", "-d", "-s", name, "-x", "120", "-y", "40", command], check=True)
    try:
        while time.perf_counter() - t0 < timeout_s:
            pane = subprocess.run(tmux + ["capture-pane", "-p", "-t", name], capture_output=True, text=True).stdout
            if all(mark in pane for mark in MARKS):
                return time.perf_counter() - t0
            time.sleep(0.02)
        raise RuntimeError(f"no first screen within {timeout_s} s; the pane shows:\n{pane}")
    finally:
        subprocess.run(tmux + ["kill-server"], capture_output=True)


def run() -> dict:
    if shutil.which("tmux") is None:
        return {"skipped": "tmux is not installed"}
    runs = int(os.environ.get("MFMA_BENCH_RUNS", "3"))
    with tempfile.TemporaryDirectory() as tmp:
        env = (f"TERM=xterm-256color MFMA_DATA_DIR={tmp}/data MFMA_CONFIG_DIR={tmp}/config "
               f"TEXTUAL_ANIMATIONS=none")
        command = f"env {env} {' '.join(mfma_command())} tui --out {tmp}/out"
        _first_screen(Path(tmp) / "tmux-0", command)  # warm-up: the file cache, not counted
        times = [_first_screen(Path(tmp) / f"tmux-{i + 1}", command) for i in range(runs)]
    median = statistics.median(times)
    return {"first_screen_s": times, "first_screen_median_s": median, "load_average_1min": load_average(),
            "targets": [target(f"TUI first screen in a 120x40 tmux pane (median of {runs})", median, TARGET_S, "s")]}


if __name__ == "__main__":
    import json

    print(json.dumps(run(), indent=2))
