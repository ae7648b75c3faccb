"""Shared pieces of the command line: exit codes, JSON output, progress on stderr.

Only the standard library is imported at module level so that ``mfma --help`` stays fast.
"""

from __future__ import annotations

import argparse
import contextlib
import functools
import json
import math
import sys
import time
from collections.abc import Iterator
from typing import Any

from assistant.errors import AssistantError

EXIT_OK, EXIT_RUNTIME, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130


class UsageError(AssistantError, ValueError):
    """Bad input from the user: exit 2 with one line."""


@functools.cache
def exit_codes() -> tuple[tuple[tuple[type[BaseException], ...], int], ...]:
    """The one table from an exception escaping a command to the exit code: the first row that matches wins.

    Two roots reach the command line. Every error of the assistant (:class:`assistant.errors.AssistantError`)
    also derives from the built-in exception of its meaning, and so does every error of the controller layer
    (:class:`drivers.errors.ControllerError`); the controller root means a runtime failure, apart from bad input
    and a set-up refused as asked, which are listed before it.
    """
    from drivers import errors as de

    return (
        ((KeyboardInterrupt,), EXIT_INTERRUPTED),  # the stage was made safe on the way out
        ((BrokenPipeError,), EXIT_RUNTIME),  # stdout closed by the reader: nothing to report
        ((de.BadURL, de.UnknownScheme, de.LimitExceeded, de.InsecureBind, de.KeyFileError), EXIT_USAGE),
        ((de.ControllerError,), EXIT_RUNTIME),
        ((ValueError, FileNotFoundError, IsADirectoryError, NotADirectoryError, PermissionError), EXIT_USAGE),
        ((BaseException,), EXIT_RUNTIME),
    )


def exit_code(exc: BaseException) -> int:
    """Exit code for an exception escaping a command (see :func:`exit_codes`)."""
    return next(code for types, code in exit_codes() if isinstance(exc, types))


def one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    msg = text[0] if text else type(exc).__name__
    if isinstance(exc, FileNotFoundError) and exc.filename:
        msg = f"file not found: {exc.filename}"
    return msg


def to_jsonable(value: Any) -> Any:
    """Plain JSON types: numpy scalars and arrays become floats and lists, NaN and inf become null."""
    np = sys.modules.get("numpy")  # a value can be a numpy object only if numpy is loaded: never import it here
    if np is not None and isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if np is not None and isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    return value


def emit_json(obj: dict) -> None:
    sys.stdout.write(json.dumps(to_jsonable(obj), allow_nan=False) + "\n")
    sys.stdout.flush()


def emit_text(lines: list[str]) -> None:
    sys.stdout.write("\n".join(lines) + "\n")


def positive(kind: type = float, *, allow_zero: bool = False):
    """argparse type: a positive number (named in the error)."""

    def parse(text: str):
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
        if not math.isfinite(value) or value < 0 or (value == 0 and not allow_zero):
            raise argparse.ArgumentTypeError(f"{text!r} must be {'non-negative' if allow_zero else 'positive'}")
        return value

    return parse


def number_list(text: str) -> list[float]:
    """argparse type: comma-separated numbers, e.g. ``10,20,50``."""
    try:
        values = [float(t) for t in text.split(",") if t.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a comma-separated list of numbers") from None
    if not values or not all(math.isfinite(v) for v in values):
        raise argparse.ArgumentTypeError(f"{text!r} must list finite numbers")
    return values


def add_controller_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--controller", default="sim://", metavar="URL",
                   help="controller URL (default sim://, the built-in simulated stage)")
    p.add_argument("--scenario", metavar="FILE_OR_NAME",
                   help=f"simulated-stage scenario (sim:// only): a TOML file or a built-in name: {scenario_names()}")
    p.add_argument("--seed", type=int, default=None, help="random seed of the simulated stage")


def scenario_names() -> str:
    """The built-in scenarios of the simulated stage, found without importing it (``--help`` stays fast)."""
    import importlib.util
    from pathlib import Path

    spec = importlib.util.find_spec("simulated_stage")
    folders = list(spec.submodule_search_locations or []) if spec is not None else []
    names = sorted(p.stem for f in folders for p in (Path(f) / "scenarios").glob("*.toml"))
    return ", ".join(names) or "none installed"


def open_controller_from_args(args: argparse.Namespace, **extra):
    """Open the controller named by ``--controller`` (+ ``--scenario``/``--seed`` for the simulated stage)."""
    from drivers.registry import open_controller, scheme_of

    url = args.controller
    options: dict[str, Any] = dict(extra)
    if scheme_of(url) == "sim":
        if getattr(args, "scenario", None):
            options["scenario"] = args.scenario
        if getattr(args, "seed", None) is not None:
            options["seed"] = args.seed
    elif getattr(args, "scenario", None):
        raise UsageError("--scenario applies only to the simulated stage (sim://)")
    return open_controller(url, **options)


@contextlib.contextmanager
def controller_for_command(args: argparse.Namespace, **extra) -> Iterator[Any]:
    """:func:`open_controller_from_args` for a command's block: a Ctrl-C anywhere in it, even between two steps,
    stops the stage through ``abort()`` before the controller is closed (:func:`.interrupts.stop_on_interrupt`)."""
    from assistant.cli.interrupts import stop_on_interrupt

    with open_controller_from_args(args, **extra) as ctl, stop_on_interrupt(ctl):
        yield ctl


class StderrProgress:
    """Render procedure events on stderr: one updating line for progress, a line per notice."""

    def __init__(self, *, quiet: bool = False) -> None:
        self.quiet = quiet
        self._last = 0.0
        self._tty = sys.stderr.isatty()
        self.notices: list[tuple[str, str]] = []

    def __call__(self, event) -> None:
        from assistant.procedures.events import Notice, Progress

        if isinstance(event, Notice):
            self.notices.append((event.level, event.text))
            if not self.quiet:
                self._clear()
                sys.stderr.write(f"[{event.level}] {event.text}\n")
            return
        if isinstance(event, Progress) and not self.quiet:
            now = time.monotonic()
            final = event.total is not None and event.done >= event.total
            if now - self._last < 0.2 and not final:
                return
            self._last = now
            total = f"/{event.total:g}" if event.total is not None else ""
            rem = f", about {event.remaining_s:.0f} s left" if event.remaining_s is not None else ""
            text = f"{event.what}: {event.done:g}{total} {event.unit} ({event.elapsed_s:.1f} s{rem})"
            if self._tty:
                sys.stderr.write("\r\033[K" + text + ("\n" if final else ""))
            else:
                sys.stderr.write(text + "\n")
            sys.stderr.flush()

    def _clear(self) -> None:
        if self._tty:
            sys.stderr.write("\r\033[K")
