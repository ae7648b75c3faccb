"""Report figures drawn side by side in worker processes, each failure kept as a note.

Matplotlib spends nearly all of a report's time laying out, drawing and writing figures, and the figures do not
depend on one another. :class:`FigureJobs` runs each figure writer either here, when its result is asked for (one
process: exactly the order and behaviour of a plain loop), or in a small pool of worker processes started by a
fork server that has matplotlib and the figure modules already imported. The session file is read only in the
calling process: a job's ``prepare`` step (reading, refitting) runs here and hands plain arrays and frozen results
to the writer, so no HDF5 handle ever crosses a process boundary, and the workers are forked from the clean
server rather than from this process (which may hold open files and threads).

The number of processes is ``MFMA_REPORT_PROCESSES``; unset, it is 1 (everything drawn in this process) unless
:func:`start_early` has started the fork server, and then 2. Measured on two cores for the default run's ten
figures, two workers started with the report were no faster than one process, whether the machine was busy or
nearly idle (2.3-2.6 s against 2.3-2.5 s): their start (a fork server importing matplotlib and scipy, about a
second) takes what the second core gives back. ``mfma run`` therefore starts the server before the stage moves,
and it imports on the second core while the simulated stage or the controller works; the report then draws on two
warm workers (the default run's report phase 1.45-1.72 s against 1.77-2.01 s in one process, the whole run 5.0-5.1 s
against 5.3-5.6 s). ``mfma report`` starts it before it loads h5py and reads the session files (the default
session's report as a process 2.5-2.7 s against 3.0-3.3 s). As with any
``forkserver`` or ``spawn`` pool, a script that builds a report must guard its entry point with
``if __name__ == "__main__"``. The workers ignore Ctrl-C: the process that asked for the figures handles it and
shuts the pool down. Should that process be killed outright, the workers leave within about a second, and the fork
server with them (it ends once no process it served is left), removing the folder of its socket as it goes
(:mod:`assistant.report.fork_server_exit`).
"""

from __future__ import annotations

import os
import signal
import threading
import time
from collections.abc import Callable
from concurrent.futures import BrokenExecutor, Future, ProcessPoolExecutor
from pathlib import Path

from assistant.ctrl_c import held

PROCESSES_ENV = "MFMA_REPORT_PROCESSES"


_STARTED_EARLY = False  # set by start_early: the fork server of this process is running with its preload


def report_processes() -> int:
    """Worker processes for the figures: ``MFMA_REPORT_PROCESSES`` if set, else 2 once :func:`start_early` has
    started the fork server, else 1 (this process)."""
    text = os.environ.get(PROCESSES_ENV, "").strip()
    if not text:
        return 2 if _STARTED_EARLY else 1
    try:
        return max(1, int(text))
    except ValueError:
        return 1


Writer = Callable[..., "Path | list[Path]"]
# imported once by the fork server, so that a worker starts with matplotlib and every figure writer loaded
_PRELOAD = ["assistant.report.fork_server_exit", "assistant.report.series_images",
            "assistant.report.calibration_figures", "assistant.report.series_figures",
            "assistant.report.imaging_figures"]


def _preload_finds_this_package() -> bool:
    """Whether the fork server would import this very package. Python 3.11's server starts with the current
    folder first on its path (not this process's path), so in a checkout of another version its preload would
    import that version's modules and the workers could not find ours; there the workers import for themselves."""
    here = Path(__file__).resolve().parents[1]
    there = Path.cwd() / here.name
    return not there.exists() or there.resolve() == here


def _forkserver_context():
    import multiprocessing
    from multiprocessing import util

    from assistant.report.fork_server_exit import FOLDER_ENV

    context = multiprocessing.get_context("forkserver")
    # the server removes the folder of its socket when it ends, also after this process was killed outright
    os.environ[FOLDER_ENV] = f"{os.getpid()}:{util.get_temp_dir()}"
    # the server imports matplotlib and the figure modules once; each worker is a fork of it
    context.set_forkserver_preload(_PRELOAD if _preload_finds_this_package() else [])
    return context


def start_early() -> bool:
    """Start the workers' fork server now, so that it imports matplotlib and the figure writers on another core
    while this process goes on; a report built later in this process then draws on two warm workers.

    Does nothing (returns False) where ``MFMA_REPORT_PROCESSES`` is set, on one core, or where the server's preload
    would not find this package (its workers would import everything themselves, which is what made two workers
    no faster). Returns whether the server runs."""
    global _STARTED_EARLY
    if os.environ.get(PROCESSES_ENV, "").strip() or (os.cpu_count() or 1) < 2 or not _preload_finds_this_package():
        return False
    if not _STARTED_EARLY:
        from multiprocessing import forkserver

        try:
            _forkserver_context()
            forkserver.ensure_running()
        except (OSError, ValueError):  # no server: the report draws in this process, as without this call
            return False
        _STARTED_EARLY = True
    return True


def _worker_start(owner_pid: int) -> None:
    """A worker's start. Ctrl-C is for the process that asked for the figures (it shuts the pool down). A worker
    also leaves once that process is gone: killed outright (SIGKILL) it cannot shut the pool down, and a worker
    waiting for its next figure would otherwise wait for ever (and keep the fork server alive with it)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    threading.Thread(target=_leave_with, args=(owner_pid,), name="leave-with-owner", daemon=True).start()


def _gone(pid: int) -> bool:
    """Whether process ``pid`` has ended: it no longer exists, its number went to another user's process, or it is
    a zombie (ended, not yet collected by its parent; Linux's /proc tells)."""
    try:
        os.kill(pid, 0)  # signal 0: only asks whether the process exists
    except (ProcessLookupError, PermissionError):
        return True
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as f:
            return f.read().rsplit(")", 1)[1].split()[0] == "Z"
    except (OSError, IndexError):
        return False


def _leave_with(owner_pid: int, period_s: float = 0.5) -> None:
    while not _gone(owner_pid):
        time.sleep(period_s)
    os._exit(1)


class Job:
    """One figure writer: what it draws (for the note), and its outcome once known."""

    def __init__(self, what: str, prepare: Callable[[], tuple]) -> None:
        self.what = what
        self.prepare = prepare
        self.future: Future | None = None
        self.error: BaseException | None = None


def _run(writer: Writer, args: tuple, kwargs: dict) -> Path | list[Path]:
    return writer(*args, **kwargs)


class FigureJobs:
    """Figure writers run here or in worker processes; ask each job for its files (or a note) in report order.

    ``prepare`` (run in this process) returns ``(writer, args, kwargs)``; ``writer(*args, **kwargs)`` draws and
    returns the path or paths written. With a pool, every job is prepared and sent off as it is submitted and
    the workers draw while the report goes on; without one, a job is prepared and drawn when :meth:`paths` asks.
    """

    def __init__(self, processes: int | None = None) -> None:
        self.processes = report_processes() if processes is None else max(1, int(processes))
        self._pool: ProcessPoolExecutor | None = None

    def __enter__(self) -> FigureJobs:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        if self._pool is not None:
            with held(deliver_after=True):
                self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None

    def _executor(self) -> ProcessPoolExecutor:
        if self._pool is None:
            # Ctrl-C waits while the pool takes its own lock (to start, take a job, shut down): a KeyboardInterrupt
            # inside it left the lock taken, and the process hung at exit in the pool's clean-up (seen once in
            # some forty Ctrl-C timed against a report's start: alive 14 minutes later)
            with held(deliver_after=True):
                self._pool = ProcessPoolExecutor(self.processes, mp_context=_forkserver_context(),
                                                 initializer=_worker_start, initargs=(os.getpid(),))
        return self._pool

    def submit(self, what: str, prepare: Callable[[], tuple]) -> Job:
        job = Job(what, prepare)
        if self.processes > 1:
            try:
                pool = self._executor()
            except (OSError, ImportError, ValueError):  # no process pool on this system (e.g. no semaphores)
                self.processes = 1  # every figure is drawn here, as with MFMA_REPORT_PROCESSES=1
                return job
            try:
                writer, args, kwargs = prepare()
                with held(deliver_after=True):
                    job.future = pool.submit(_run, writer, args, kwargs)
            except BrokenExecutor:  # a worker died: this figure is drawn here when asked for
                job.future = None
            except Exception as exc:
                job.error = exc
        return job

    def paths(self, job: Job, notes: list[str]) -> list[Path]:
        """The files the job wrote (sorted), or none and a note: one figure must not cost the whole report."""
        try:
            if job.error is not None:
                raise job.error
            if job.future is not None:
                try:
                    written = job.future.result()
                except BrokenExecutor:  # a worker died (or could not start): draw this figure here instead
                    writer, args, kwargs = job.prepare()
                    written = writer(*args, **kwargs)
            else:
                writer, args, kwargs = job.prepare()
                written = writer(*args, **kwargs)
        except Exception as exc:
            notes.append(f"{job.what} failed: {type(exc).__name__}: {exc}")
            return []
        return sorted([written] if isinstance(written, Path) else written)
