"""Report figures drawn side by side in worker processes, each failure kept as a note.

Matplotlib spends nearly all of a report's time laying out, drawing and writing figures, and the figures do not
depend on one another. :class:`FigureJobs` runs each figure writer either here, when its result is asked for (one
process: exactly the order and behaviour of a plain loop), or in a small pool of worker processes started by a
fork server that has matplotlib and the figure modules already imported. The session file is read only in the
calling process: a job's ``prepare`` step (reading, refitting) runs here and hands plain arrays and frozen results
to the writer, so no HDF5 handle ever crosses a process boundary, and the workers are forked from the clean
server rather than from this process (which may hold open files and threads).

The number of processes is ``MFMA_REPORT_PROCESSES`` (default 1: everything drawn in this process). Measured on two
cores for the default run's ten figures, two workers were no faster than one process, whether the machine was busy
or nearly idle (2.3-2.6 s against 2.3-2.5 s): their start (a fork server importing matplotlib and scipy, about a
second) takes what the second core gives back. They can pay for reports with many more figures. As with any
``forkserver`` or ``spawn`` pool, a script that builds a report must guard its entry point with
``if __name__ == "__main__"``.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from concurrent.futures import BrokenExecutor, Future, ProcessPoolExecutor
from pathlib import Path

PROCESSES_ENV = "MFMA_REPORT_PROCESSES"


def report_processes() -> int:
    """Worker processes for the figures: ``MFMA_REPORT_PROCESSES`` if set, else 1 (this process)."""
    text = os.environ.get(PROCESSES_ENV, "").strip()
    try:
        return max(1, int(text)) if text else 1
    except ValueError:
        return 1


Writer = Callable[..., "Path | list[Path]"]
# imported once by the fork server, so that a worker starts with matplotlib and every figure writer loaded
_PRELOAD = ["assistant.report.series_images", "assistant.report.calibration_figures",
            "assistant.report.series_figures", "assistant.report.imaging_figures"]


def _preload_finds_this_package() -> bool:
    """Whether the fork server would import this very package. Python 3.11's server starts with the current
    folder first on its path (not this process's path), so in a checkout of another version its preload would
    import that version's modules and the workers could not find ours; there the workers import for themselves."""
    here = Path(__file__).resolve().parents[1]
    there = Path.cwd() / here.name
    return not there.exists() or there.resolve() == here


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
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None

    def _executor(self) -> ProcessPoolExecutor:
        if self._pool is None:
            import multiprocessing

            context = multiprocessing.get_context("forkserver")
            # the server imports matplotlib and the figure modules once; each worker is a fork of it
            context.set_forkserver_preload(_PRELOAD if _preload_finds_this_package() else [])
            self._pool = ProcessPoolExecutor(self.processes, mp_context=context)
        return self._pool

    def submit(self, what: str, prepare: Callable[[], tuple]) -> Job:
        job = Job(what, prepare)
        if self.processes > 1:
            try:
                writer, args, kwargs = prepare()
                job.future = self._executor().submit(_run, writer, args, kwargs)
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
