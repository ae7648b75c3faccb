"""What a command's imports alone cost: the floor under its whole-process time.

``python imports_only.py record LIST ARGS...`` runs ``mfma ARGS...`` in this process (its output thrown away) and
writes the names of every module it ended up loading to LIST, in the order they were loaded.
``python imports_only.py load LIST`` imports those modules and exits: timed as a whole process, it is what the
command would cost if its work took no time. ``bench_commands.py`` times it beside the plain script.
"""

from __future__ import annotations

import contextlib
import importlib
import io
import sys


def record(path: str, argv: list[str]) -> None:
    from assistant.cli import main

    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        main(argv)
    names = [n for n in list(sys.modules) if not n.startswith("__")]
    with open(path, "w", encoding="utf-8") as f:
        f.write("\n".join(names))


def load(path: str) -> None:
    with open(path, encoding="utf-8") as f:
        for name in f.read().split():
            if name not in sys.modules:
                try:
                    importlib.import_module(name)
                except Exception:  # a module a package loads only in a special way; the package itself is loaded
                    pass


if __name__ == "__main__":
    if sys.argv[1] == "record":
        record(sys.argv[2], sys.argv[3:])
    else:
        load(sys.argv[2])
