"""``mfma report SESSION.h5 [--out DIR]``: PNG figures and a summary from a session file."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, emit_json, emit_text


def run(args) -> int:
    from assistant.report.summary import build_report

    session = Path(args.session)
    if not session.is_file():
        raise UsageError(f"file not found: {session}")
    out = Path(args.out) if args.out else session.parent / f"report-{session.stem}"
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UsageError(f"output folder {out} cannot be created: {exc.strerror}") from None
    result = build_report(session, out)
    if args.json:
        emit_json({"report_dir": str(out), "files": [str(p) for p in result.paths]})
    else:
        emit_text([f"wrote {len(result.paths)} file(s) to {out}"] + [f"  {p.name}" for p in result.paths])
    return 0
