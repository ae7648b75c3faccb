"""Suite-wide settings: report figures drawn in-process, and tests marked ``alone``.

Tests marked ``alone`` run while no other test runs, also under pytest-xdist's parallel workers.
A few tests measure how this program behaves in time (the UI thread's responsiveness while a series runs in its
worker): another worker's test on the same two cores takes the CPU from the process measured and says nothing
about our code. Every test holds a shared lock on one file for its whole run (set-up, call, tear-down); an
``alone`` test holds it exclusively. A turnstile lock taken first gives the exclusive request priority, so the
other workers cannot starve it by starting test after test.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import shutil
import tempfile
from pathlib import Path

import pytest

# Report figures are drawn in the test's own process (the default, pinned here against a developer's environment):
# every core already runs a test worker, and tests replace figure writers in this process.
# tests/report/test_figure_jobs.py covers the worker processes.
os.environ.setdefault("MFMA_REPORT_PROCESSES", "1")

_ENV = "MFMA_TESTS_LOCK_DIR"


def pytest_configure(config):
    config.addinivalue_line("markers", "alone: run while no other test runs (also under -n)")
    if not hasattr(config, "workerinput") and _ENV not in os.environ:  # the controlling process
        os.environ[_ENV] = config._mfma_lock_dir = tempfile.mkdtemp(prefix="mfma-tests-")


def pytest_unconfigure(config):
    made = getattr(config, "_mfma_lock_dir", None)
    if made is not None:
        shutil.rmtree(made, ignore_errors=True)
        os.environ.pop(_ENV, None)


@contextlib.contextmanager
def _locked(path: Path, mode: int):
    with open(path, "a") as f:
        fcntl.flock(f, mode)
        try:
            yield
        finally:
            fcntl.flock(f, fcntl.LOCK_UN)


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_protocol(item, nextitem):
    folder = os.environ.get(_ENV)
    if folder is None or not hasattr(item.config, "workerinput"):  # one process: tests run one at a time anyway
        yield
        return
    turnstile, shared = Path(folder) / "turnstile", Path(folder) / "tests"
    if item.get_closest_marker("alone") is not None:
        with _locked(turnstile, fcntl.LOCK_EX), _locked(shared, fcntl.LOCK_EX):
            yield
    else:
        with _locked(turnstile, fcntl.LOCK_EX):
            pass  # waits while an alone test is waiting or running
        with _locked(shared, fcntl.LOCK_SH):
            yield
