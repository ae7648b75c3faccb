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


def test_start_early_gives_two_warm_workers_unless_told_otherwise(tmp_path, monkeypatch):
    from assistant.report import figure_jobs

    monkeypatch.setattr(figure_jobs, "_STARTED_EARLY", False)  # put back after the test
    monkeypatch.setattr(figure_jobs.os, "cpu_count", lambda: 1)
    monkeypatch.delenv("MFMA_REPORT_PROCESSES")
    assert not figure_jobs.start_early() and report_processes() == 1  # one core: nothing to gain
    monkeypatch.setattr(figure_jobs.os, "cpu_count", lambda: 2)
    monkeypatch.setenv("MFMA_REPORT_PROCESSES", "1")
    assert not figure_jobs.start_early() and report_processes() == 1  # the user's setting wins
    monkeypatch.delenv("MFMA_REPORT_PROCESSES")
    assert figure_jobs.start_early() and report_processes() == 2
    notes: list[str] = []
    with FigureJobs() as jobs:
        assert jobs.processes == 2
        handles = [jobs.submit(f"topography {i}", lambda i=i: _topography_job(tmp_path / f"t{i}.png"))
                   for i in range(3)]
        assert all(job.future is not None for job in handles)
        found = [p for job in handles for p in jobs.paths(job, notes)]
    assert [p.name for p in found] == ["t0.png", "t1.png", "t2.png"] and notes == []


def _running(pid: int) -> bool:
    from assistant.report.figure_jobs import _gone

    return not _gone(pid)


def test_a_worker_waits_for_its_owner_and_leaves_when_it_is_gone():
    import subprocess
    import sys
    import time

    owner = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(0.6)"])
    watcher = subprocess.Popen([sys.executable, "-c", "import sys; from assistant.report.figure_jobs import "
                                "_leave_with; _leave_with(int(sys.argv[1]), 0.05)", str(owner.pid)])
    time.sleep(0.3)
    assert watcher.poll() is None  # the owner still runs
    owner.wait()
    assert watcher.wait(10) == 1


def test_workers_of_a_killed_report_leave(tmp_path):
    # SIGKILL to the process that asked for the figures: it cannot shut its pool down, so the workers must notice
    import subprocess
    import sys
    import time

    script = tmp_path / "owner.py"
    script.write_text(
        "import os, signal, sys\n"
        "from multiprocessing import forkserver\n"
        "from assistant.report.figure_jobs import FigureJobs\n"
        "if __name__ == '__main__':\n"
        "    jobs = FigureJobs(2)\n"
        "    import time\n"
        "    for f in [jobs._executor().submit(time.sleep, 0.3) for _ in range(2)]:\n"
        "        f.result()  # both workers are up\n"
        "    print(*jobs._pool._processes, forkserver._forkserver._forkserver_pid, flush=True)\n"
        "    os.kill(os.getpid(), signal.SIGKILL)\n")
    out = tmp_path / "pids.txt"
    with open(out, "w") as f:  # a file, not a pipe: a worker left behind would hold a pipe open
        owner = subprocess.run([sys.executable, str(script)], stdout=f, stderr=subprocess.DEVNULL, timeout=60,
                               cwd=Path(__file__).resolve().parents[2])
    assert owner.returncode == -9
    pids = [int(p) for p in out.read_text().split()]
    assert len(pids) == 3
    deadline = time.monotonic() + 10.0
    while any(_running(p) for p in pids) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not [p for p in pids if _running(p)]


def test_a_killed_report_leaves_no_temporary_folder(tmp_path):
    # multiprocessing keeps the fork server's socket in a pymp-* folder that only a normal exit removed: every
    # `mfma run` killed outright left one in the temporary directory; the server now removes it as it ends
    import os
    import subprocess
    import sys
    import time

    script = tmp_path / "owner.py"
    script.write_text(
        "import os, signal\n"
        "from assistant.report.figure_jobs import FigureJobs\n"
        "if __name__ == '__main__':\n"
        "    import time\n"
        "    FigureJobs(2)._executor().submit(time.sleep, 0.1).result()  # the server and a worker are up\n"
        "    os.kill(os.getpid(), signal.SIGKILL)\n")
    import shutil
    import tempfile

    temporary = Path(tempfile.mkdtemp(prefix="mfma-"))  # short: the socket's path must fit in 108 bytes
    try:
        owner = subprocess.run([sys.executable, str(script)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                               text=True, timeout=60, cwd=Path(__file__).resolve().parents[2],
                               env={**os.environ, "TMPDIR": str(temporary)})
        assert owner.returncode == -9, owner.stderr[-800:]
        deadline = time.monotonic() + 10.0
        while any(temporary.iterdir()) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert not list(temporary.rglob("*"))
    finally:
        shutil.rmtree(temporary, ignore_errors=True)


def test_a_fork_server_started_by_another_process_leaves_the_folder_alone(tmp_path, monkeypatch):
    # a process started by `mfma run` inherits the variable: only the run's own server may remove the folder
    import os

    from assistant.report import fork_server_exit

    folder = tmp_path / "pymp-abc"
    monkeypatch.setattr(os, "getppid", lambda: 4242)
    assert fork_server_exit._ours(f"4242:{folder}") == str(folder)
    assert fork_server_exit._ours(f"4243:{folder}") is None and fork_server_exit._ours("") is None
    assert fork_server_exit._ours(f"4242:{tmp_path / 'other'}") is None  # never a folder multiprocessing did not make


def test_without_a_process_pool_the_figures_are_drawn_here(tmp_path, monkeypatch):
    # a system without working semaphores (or without fork servers) cannot start the pool: nothing is lost
    from assistant.report import figure_jobs

    def no_pool():
        raise OSError("this platform lacks a functioning sem_open implementation")

    monkeypatch.setattr(figure_jobs, "_forkserver_context", no_pool)
    notes: list[str] = []
    with FigureJobs(2) as jobs:
        handles = [jobs.submit(f"topography {i}", lambda i=i: _topography_job(tmp_path / f"t{i}.png"))
                   for i in range(2)]
        assert jobs.processes == 1 and all(job.future is None for job in handles)
        found = [p for job in handles for p in jobs.paths(job, notes)]
    assert [p.name for p in found] == ["t0.png", "t1.png"] and notes == []


def test_ctrl_c_waits_until_the_pool_is_out_of_its_locks(monkeypatch):
    # A KeyboardInterrupt raised while the pool holds its own lock (starting, accepting a job, shutting down) can
    # leave the lock taken and hang the process at exit; a Ctrl-C there is delivered once the call has returned.
    import signal

    from assistant.report import figure_jobs

    calls: list[str] = []

    class Pool:
        def __init__(self, *args, **kwargs):
            signal.raise_signal(signal.SIGINT)  # Ctrl-C in the middle of the pool's start (to this thread)
            calls.append("started")

        def submit(self, *args):
            signal.raise_signal(signal.SIGINT)
            calls.append("accepted")

        def shutdown(self, **kwargs):
            signal.raise_signal(signal.SIGINT)
            calls.append("shut down")

    monkeypatch.setattr(figure_jobs, "ProcessPoolExecutor", Pool)
    before = signal.signal(signal.SIGINT, signal.default_int_handler)  # as in a shell, whatever ran the tests
    try:
        jobs = FigureJobs(2)
        for step in (jobs._executor, lambda: jobs.submit("a figure", lambda: (None, (), {})), jobs.close):
            try:
                step()
            except KeyboardInterrupt:
                calls.append("interrupted")
        assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # put back after each
    finally:
        signal.signal(signal.SIGINT, before)
    assert calls == ["started", "interrupted", "accepted", "interrupted", "shut down", "interrupted"]
