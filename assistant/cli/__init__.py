"""``mfma``: the command line. Thin: parse, call the procedures and analysis, print results.

Every command has ``--help``; exit 0 on success, 2 on bad usage or input (one line, no traceback), 1 on a
runtime failure, 130 after Ctrl-C, SIGTERM or SIGHUP (the stage is withdrawn first). ``--json`` prints exactly one
JSON object on stdout; progress goes to stderr. Handlers live in ``assistant.cli.cmd_*`` and are imported only
when run.
"""

from __future__ import annotations

import importlib
import sys

from assistant import __version__
from assistant.cli import _common as c
from assistant.cli.parser import build_parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse already printed its one-line error (or the help)
        return int(exc.code or 0)
    if not getattr(args, "handler", None):
        parser.print_help()
        return c.EXIT_USAGE
    module_name, _, func_name = args.handler.partition(":")
    from assistant.cli.interrupts import terminations_as_interrupts

    try:
        handler = getattr(importlib.import_module(f"assistant.cli.{module_name}"), func_name)
        with terminations_as_interrupts():  # a `kill` or a closed terminal stops the stage as Ctrl-C does
            return int(handler(args) or 0)
    except (Exception, KeyboardInterrupt) as exc:  # one line, no traceback; the exit code says what kind
        from assistant.cli.interrupts import caused_by_ctrl_c

        if caused_by_ctrl_c(exc):  # the stage is said safe only where a stop confirmed it
            safe = getattr(exc, "stage_made_safe", False)
            sys.stderr.write("mfma: interrupted; the stage was made safe (tip withdrawn, drive off, bias 0 V, "
                             "any applied field 0)\n" if safe else "mfma: interrupted\n")
            return c.EXIT_INTERRUPTED
        if not isinstance(exc, BrokenPipeError):
            safe = "; the stage was made safe" if getattr(exc, "stage_made_safe", False) else ""
            sys.stderr.write(f"mfma: error: {c.one_line(exc)}{safe}\n")
            if getattr(args, "debug", False):
                raise
        return c.exit_code(exc)


__all__ = ["main", "__version__"]
