"""``mfma run`` and ``mfma report`` as a user starts them, without ``MFMA_REPORT_PROCESSES`` (the suite pins it to 1
everywhere else): the figure workers' fork server starts early (before the stage moves; before the session is
read), the report draws on two workers, and its figures are the same files, byte for byte, as those of a report
drawn in one process."""

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
        code = main(sys.argv[1:])
    print(code, figure_jobs.report_processes())
"""
TWO = 2 if (os.cpu_count() or 1) >= 2 else 1


def _mfma(tmp_path: Path, argv: list[str], processes: str | None) -> str:
    env = {k: v for k, v in os.environ.items() if k != "MFMA_REPORT_PROCESSES"}
    env.update(MFMA_DATA_DIR=str(tmp_path / "data"), MFMA_CONFIG_DIR=str(tmp_path / "config"))
    if processes is not None:
        env["MFMA_REPORT_PROCESSES"] = processes
    done = subprocess.run([sys.executable, "-c", CODE, *argv], capture_output=True, text=True, cwd=ROOT, env=env,
                          timeout=240)
    assert done.returncode == 0, done.stderr
    return done.stdout.strip().splitlines()[-1]


def _figures(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in folder.glob("report-*/*.png")}


def _run(tmp_path: Path, name: str, processes: str | None) -> tuple[str, dict[str, bytes]]:
    said = _mfma(tmp_path, ["run", *SMALL, "--out", str(tmp_path / name)], processes)
    return said, _figures(tmp_path / name)


def test_run_and_report_draw_on_two_warm_workers_with_the_same_figures(tmp_path):
    said, figures = _run(tmp_path, "workers", None)
    assert said == f"0 {TWO}"
    said_here, figures_here = _run(tmp_path, "here", "1")
    assert said_here == "0 1"
    assert len(figures) >= 8 and figures.keys() == figures_here.keys()
    assert [name for name in figures if figures[name] != figures_here[name]] == []
    # the report of a stored session: the same figures again, drawn on two workers and in one process
    session = str(next((tmp_path / "here").glob("session-*.h5")))
    assert _mfma(tmp_path, ["report", session, "--out", str(tmp_path / "again")], None) == f"0 {TWO}"
    assert _mfma(tmp_path, ["report", session, "--out", str(tmp_path / "again-here")], "1") == "0 1"
    again, again_here = _figures(tmp_path / "again"), _figures(tmp_path / "again-here")
    assert again.keys() == figures.keys()
    assert [name for name in again if again[name] != again_here[name] or again[name] != figures[name]] == []
