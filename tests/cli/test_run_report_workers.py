"""``mfma run`` as a user starts it, without ``MFMA_REPORT_PROCESSES`` (the suite pins it to 1 everywhere else): the
figure workers' fork server starts before the stage moves, the report draws on two workers, and its figures are
the same files, byte for byte, as those of a report drawn in one process from the same run."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SMALL = ["--lines", "10", "--pixels", "32", "--heights", "10,20,40", "--thermal-seconds", "0.5", "--seed", "7"]
CODE = """
import contextlib, io, sys
from assistant.cli import main
from assistant.report import figure_jobs
if __name__ == "__main__":
    with contextlib.redirect_stdout(io.StringIO()):
        code = main(["run", *sys.argv[1:]])
    print(code, figure_jobs.report_processes())
"""


def _run(tmp_path: Path, name: str, processes: str | None) -> tuple[str, dict[str, bytes]]:
    env = {k: v for k, v in os.environ.items() if k != "MFMA_REPORT_PROCESSES"}
    env.update(MFMA_DATA_DIR=str(tmp_path / "data"), MFMA_CONFIG_DIR=str(tmp_path / "config"))
    if processes is not None:
        env["MFMA_REPORT_PROCESSES"] = processes
    out = tmp_path / name
    done = subprocess.run([sys.executable, "-c", CODE, *SMALL, "--out", str(out)], capture_output=True, text=True,
                          cwd=ROOT, env=env, timeout=240)
    assert done.returncode == 0, done.stderr
    figures = {p.name: p.read_bytes() for p in out.glob("report-*/*.png")}
    return done.stdout.strip().splitlines()[-1], figures


def test_a_run_draws_its_report_on_two_warm_workers_with_the_same_figures(tmp_path):
    said, figures = _run(tmp_path, "workers", None)
    assert said == f"0 {2 if (os.cpu_count() or 1) >= 2 else 1}"
    said_here, figures_here = _run(tmp_path, "here", "1")
    assert said_here == "0 1"
    assert len(figures) >= 8 and figures.keys() == figures_here.keys()
    assert [name for name in figures if figures[name] != figures_here[name]] == []
