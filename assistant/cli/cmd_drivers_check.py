"""``mfma drivers check URL`` (the conformance kit) and ``mfma drivers new NAME DIR`` (a plug-in skeleton)."""

from __future__ import annotations

import sys

from assistant.cli._common import EXIT_OK, EXIT_RUNTIME, UsageError, emit_json, emit_text


def _pace_realtime(url: str) -> str:
    """A simulated stage is checked in realtime pace unless the URL says otherwise: the timing checks (Z speed,
    abort latency) need a stage that keeps wall-clock time."""
    from urllib.parse import parse_qs, urlsplit

    parts = urlsplit(url)
    if parts.scheme.lower() != "sim" or "pace" in parse_qs(parts.query):
        return url
    return url + ("&" if parts.query else ("" if url.endswith("?") else "?")) + "pace=realtime"


def _asker(yes: bool):
    def confirm(level: str, plan: str) -> bool:
        import shutil
        import textwrap

        # wrapped at the terminal's width: at 80 columns the plan's words were cut in two at every line's end
        width = max(40, shutil.get_terminal_size().columns - 1)
        sys.stderr.write("\n" + textwrap.fill(f"{level}: the kit will {plan}", width=width) + "\n")
        if yes:
            sys.stderr.write("(--yes: going ahead)\n")
            return True
        if not sys.stdin.isatty():
            sys.stderr.write(f"no terminal to ask on: the {level} level does not run (give --yes to run it)\n")
            return False
        sys.stderr.write("Go ahead? [y/N] ")
        sys.stderr.flush()
        return sys.stdin.readline().strip().lower() in ("y", "yes")

    return confirm


def _line(check) -> str:
    return f"{'pass' if check.passed else 'FAIL'}  {check.level:<8} {check.name:<32} {check.detail}"


def check(args) -> int:
    from drivers.conformance import run_checks
    from drivers.registry import open_controller, redact

    url = _pace_realtime(args.url)
    if url != args.url:
        sys.stderr.write(f"checking {url} (the simulated stage in realtime pace, so that it can be timed)\n")
    ctl = open_controller(url)

    def progress(c) -> None:  # each result as it comes: on stdout, or as progress on stderr with --json
        stream = sys.stderr if args.json else sys.stdout
        stream.write(_line(c) + "\n")
        stream.flush()

    try:
        result = run_checks(ctl, level=args.level, url=url, confirm=_asker(args.yes), progress=progress)
    finally:
        ctl.close()
    if args.json:
        out = result.to_dict()
        out["url"] = redact(url)
        emit_json(out)
    else:
        failed = result.failed()
        summary = (f"{len(result.checks) - len(failed)} of {len(result.checks)} checks passed at level "
                   f"{args.level}" + (f"; failed: {', '.join(failed)}" if failed else ""))
        emit_text(["", summary] + ([result.stopped] if result.stopped else []))
    return EXIT_OK if result.passed else EXIT_RUNTIME  # a broken promise is a runtime failure of the driver


def new(args) -> int:
    from drivers.conformance.skeleton import SkeletonError, write_skeleton

    try:
        written = write_skeleton(args.name, args.directory)
    except SkeletonError as exc:
        raise UsageError(str(exc)) from None
    emit_text([f"wrote {p}" for p in written] + [
        "",
        f"next: pip install -e {args.directory} ; python -m pytest {args.directory}/tests   (it lists what to fill in)",
        f"then: mfma drivers check {args.name}://ADDRESS --level signals   (nothing moves at this level)"])
    return EXIT_OK
