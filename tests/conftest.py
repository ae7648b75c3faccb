"""Suite-wide settings."""

import os

# Report figures are drawn in this process (the default, pinned here against a developer's environment): every core
# already runs a test worker (pytest-xdist), and tests replace figure writers in this process.
# tests/report/test_figure_jobs.py covers the worker processes.
os.environ.setdefault("MFMA_REPORT_PROCESSES", "1")
