"""Imported first by the figures' fork server (``figure_jobs._PRELOAD``): when the server ends, it removes the
folder of its listening socket.

Python's multiprocessing puts that socket in a ``pymp-*`` folder in the temporary directory of the process that
starts the server, and removes the folder only when that process exits normally; ``mfma run`` killed outright
(SIGKILL, a crash) left one behind for every run. The server outlives its starter by a moment (it ends once no
process it served is left), and removes the folder then. The starter names the folder in
:data:`FOLDER_ENV` as ``<its pid>:<folder>``; a server started by any other process (a child that inherited the
variable) leaves it alone.
"""

from __future__ import annotations

import atexit
import os
import shutil

FOLDER_ENV = "MFMA_FORK_SERVER_FOLDER"


def _ours(value: str) -> str | None:
    """The folder named in ``value`` if this process was started by the process that named it."""
    pid, _, folder = value.partition(":")
    if not pid.isdigit() or int(pid) != os.getppid() or not os.path.basename(folder).startswith("pymp-"):
        return None
    return folder


def _remove(folder: str, server_pid: int) -> None:
    if os.getpid() == server_pid:  # not in a worker forked from the server (they leave by os._exit anyway)
        shutil.rmtree(folder, ignore_errors=True)


_folder = _ours(os.environ.get(FOLDER_ENV, ""))
if _folder is not None:
    atexit.register(_remove, _folder, os.getpid())
