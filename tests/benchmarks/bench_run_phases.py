"""Where the time of ``mfma run`` on the default scenario goes: each phase timed inside one run (seed 1).

The phases are the workflow's steps (calibration, approach, series, analysis) and the report, timed by wrapping
those functions in this process; "start" is everything before the calibration (imports, opening the simulated
stage, the session file) and "other" the rest. The largest phase is named with its share. Target: the report
phase halved against the code before the figures were laid out at fixed margins (``REPORT_BEFORE_S``, measured
the same way: runs in one process without a profiler, the median of three, so the first run's imports weigh
once). ``MFMA_BENCH_RUNS`` sets the number of runs (default 3).

``MFMA_BENCH_PROFILE=1`` adds one profiled run for the report's own split (figure drawing and PNG writing by
matplotlib against the rest); the profiler slows the code it watches, so that run never counts for the target.
The processes the report used are printed beside the phases.
"""

from __future__ import annotations

import contextlib
import cProfile
import io
import os
import pstats
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parents[1]))

from timing import load_average, target  # noqa: E402

# The report phase of the code before the fixed-margin figures, measured side by side with it (no profiler,
# interleaved runs, medians of three) at load 2-5 on two cores: 3.9-4.2 s. (The first reference, 8.4 s, was a
# profiled run at load ~3, which the profile slowed by about half again.)
REPORT_BEFORE_S = 4.0


def _one_run(folder: Path, profiled: bool = False) -> dict:
    from assistant.cli import main
    from assistant.procedures import workflow as wf_module
    from assistant.report import summary

    spent: dict[str, float] = {}
    patched = []

    def timed(owner, name, label):
        original = getattr(owner, name)

        def wrapper(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                return original(*args, **kwargs)
            finally:
                spent[label] = spent.get(label, 0.0) + time.perf_counter() - t0
                spent.setdefault("_first_" + label, t0)

        setattr(owner, name, wrapper)
        patched.append((owner, name, original))

    for name in ("calibrate", "approach", "series", "analyse"):
        timed(wf_module.Workflow, name, name)
    timed(summary, "build_report", "report")
    profile = cProfile.Profile() if profiled else None
    os.environ["MFMA_DATA_DIR"], os.environ["MFMA_CONFIG_DIR"] = str(folder / "data"), str(folder / "config")
    t0 = time.perf_counter()
    try:
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
            if profile is not None:
                profile.enable()
            main(["run", "--seed", "1", "--out", str(folder / "out"), "--json"])
            if profile is not None:
                profile.disable()
    finally:
        for owner, name, original in patched:
            setattr(owner, name, original)
    total = time.perf_counter() - t0
    savefig = float("nan")
    if profile is not None:
        stats = pstats.Stats(profile)
        savefig = sum(v[3] for k, v in stats.stats.items() if k[2] == "savefig" and "matplotlib" in k[0])
    phases = {k: v for k, v in spent.items() if not k.startswith("_")}
    phases["start"] = spent.get("_first_calibrate", t0) - t0
    phases["other"] = total - sum(phases.values())
    return {"total_s": total, "phases_s": phases, "report_savefig_s": savefig}


def run() -> dict:
    runs = int(os.environ.get("MFMA_BENCH_RUNS", "3"))
    with tempfile.TemporaryDirectory() as tmp:
        results = [_one_run(Path(tmp) / str(i)) for i in range(runs)]
        split = (_one_run(Path(tmp) / "profiled", profiled=True)["report_savefig_s"]
                 if os.environ.get("MFMA_BENCH_PROFILE") == "1" else float("nan"))
    phases = {k: statistics.median(r["phases_s"][k] for r in results) for k in results[0]["phases_s"]}
    total = statistics.median(r["total_s"] for r in results)
    top = max(phases, key=phases.get)
    report = phases["report"]
    try:
        from assistant.report.figure_jobs import report_processes
        processes = report_processes()
    except ImportError:  # a tree from before the figure jobs: always this process
        processes = 1
    return {"total_s": total, "phases_s": phases, "report_processes": processes, "dominating_phase": top, "dominating_share": phases[top] / total,
            "report_in_matplotlib_savefig_s_profiled": split,
            "load_average_1min": load_average(),
            "targets": [target(f"mfma run: report phase (dominating: {top}, {phases[top] / total:.0%} of "
                               f"{total:.1f} s), half of {REPORT_BEFORE_S} s", report, REPORT_BEFORE_S / 2, "s")]}


if __name__ == "__main__":
    import json

    print(json.dumps(run(), indent=2))
