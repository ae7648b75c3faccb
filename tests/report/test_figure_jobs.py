"""Figure jobs: drawn in worker processes or here, every file returned in report order, each failure a note."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from assistant.report.calibration_figures import write_thermal_figure
from assistant.report.figure_jobs import FigureJobs, report_processes
from assistant.report.series_images import write_topography

PNG = b"\x89PNG\r\n\x1a\n"


def _topography_job(path: Path):
    z = np.add.outer(np.linspace(0, 2e-9, 16), np.sin(np.linspace(0, 6, 16)) * 1e-9)
    return write_topography, (z, path), {"scan_size_m": 2e-6, "lines": 16, "title": "t: topography"}


def test_workers_draw_the_figures_and_a_failure_in_a_worker_becomes_a_note(tmp_path):
    notes: list[str] = []
    with FigureJobs(2) as jobs:
        broken = jobs.submit("thermal spectrum figure", lambda: (write_thermal_figure, (None, tmp_path / "t.png"), {}))
        good = [jobs.submit(f"topography {i}", lambda i=i: _topography_job(tmp_path / f"topo{i}.png"))
                for i in range(2)]
        assert all(job.future is not None for job in [broken, *good])  # sent to the pool, not drawn here
        found = [p for job in [broken, *good] for p in jobs.paths(job, notes)]
    assert found == [tmp_path / "topo0.png", tmp_path / "topo1.png"]
    assert all(p.read_bytes()[:8] == PNG for p in found)
    assert notes == ["thermal spectrum figure failed: AttributeError: 'NoneType' object has no attribute 'fit'"]


def test_one_process_draws_each_job_when_asked_in_order(tmp_path):
    order: list[str] = []

    def prepare(name: str):
        order.append(name)
        if name == "b":
            raise ValueError("no data")
        return _topography_job(tmp_path / f"{name}.png")

    notes: list[str] = []
    with FigureJobs(1) as jobs:
        handles = [jobs.submit(f"figure {n}", lambda n=n: prepare(n)) for n in "abc"]
        assert order == []  # nothing drawn before it is asked for: a plain loop's order and side effects
        found = [p for job in handles for p in jobs.paths(job, notes)]
    assert order == ["a", "b", "c"] and [p.name for p in found] == ["a.png", "c.png"]
    assert notes == ["figure b failed: ValueError: no data"]


def test_processes_from_the_environment(monkeypatch):
    monkeypatch.setenv("MFMA_REPORT_PROCESSES", "1")
    assert report_processes() == 1
    monkeypatch.setenv("MFMA_REPORT_PROCESSES", "3")
    assert report_processes() == 3
    monkeypatch.setenv("MFMA_REPORT_PROCESSES", "two")
    assert report_processes() == 1
    monkeypatch.delenv("MFMA_REPORT_PROCESSES")
    assert report_processes() == 1


def test_the_fork_server_preloads_only_where_it_would_import_this_package(tmp_path, monkeypatch):
    from assistant.report import figure_jobs

    monkeypatch.chdir(tmp_path)
    assert figure_jobs._preload_finds_this_package()
    (tmp_path / "assistant").mkdir()  # a checkout of another version in the current folder
    assert not figure_jobs._preload_finds_this_package()
