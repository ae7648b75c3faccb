"""Where output goes: one convention for ``mfma run``, ``calibrate``, ``report`` and the terminal UI.

Every command that records writes ``session-<UTC time>.h5`` into its output folder (``--out DIR``, default
``./mfma-out``); the report of a session file goes into ``report-<UTC time>/`` beside it (or inside ``--out`` of
``mfma report``), named after the session file, so ``session-20261204T101500Z.h5`` has its figures in
``report-20261204T101500Z/`` whichever command wrote them. Standard library only.
"""

from __future__ import annotations

import os
from datetime import datetime, timezone
from pathlib import Path

DEFAULT_OUT_DIR = Path("mfma-out")
SESSION_PREFIX = "session-"
REPORT_PREFIX = "report-"


def utc_stamp(now: datetime | None = None) -> str:
    """``20261204T101500Z``: sortable, and safe in file names on every system."""
    return (now or datetime.now(timezone.utc)).strftime("%Y%m%dT%H%M%SZ")


def new_session_path(out_dir: str | os.PathLike[str] = DEFAULT_OUT_DIR, *, now: datetime | None = None) -> Path:
    """``OUT/session-<UTC time>.h5``; a suffix ``-2``, ``-3``, ... if a file of that second exists already."""
    out = Path(out_dir)
    stamp = utc_stamp(now)
    path = out / f"{SESSION_PREFIX}{stamp}.h5"
    n = 2
    while path.exists():
        path = out / f"{SESSION_PREFIX}{stamp}-{n}.h5"
        n += 1
    return path


def report_dir_for(session_path: str | os.PathLike[str], out_dir: str | os.PathLike[str] | None = None) -> Path:
    """The report folder of a session file: ``report-<its name without "session-">`` beside it or in ``out_dir``."""
    p = Path(session_path)
    stem = p.stem[len(SESSION_PREFIX):] if p.stem.startswith(SESSION_PREFIX) else p.stem
    return (Path(out_dir) if out_dir is not None else p.parent) / f"{REPORT_PREFIX}{stem}"
