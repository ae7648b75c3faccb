"""``mfma report SESSION.h5 [SESSION.h5 ...] [--out DIR]``: PNG figures and a summary for each session file."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, emit_json, emit_text


def run(args) -> int:
    from assistant.cli.progress import StageProgress
    from assistant.outputs import report_dir_for
    from assistant.report.figure_jobs import start_early

    sessions = [Path(s) for s in args.sessions]
    missing = [str(s) for s in sessions if not s.is_file()]
    if missing:
        raise UsageError(f"file not found: {', '.join(missing)}")
    targets = [report_dir_for(s, args.out) for s in sessions]
    if len(set(targets)) < len(targets):
        raise UsageError("two session files of the same name would share one report folder; report them one "
                         "at a time with different --out folders")
    for out in targets:
        try:
            out.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UsageError(f"output folder {out} cannot be created: {exc.strerror}") from None
    # the figure workers load matplotlib on the second core while this process loads h5py and reads the sessions
    start_early()
    from assistant.report.summary import build_report

    reports = []
    with StageProgress() as progress:
        for session, out in zip(sessions, targets):
            result = build_report(session, out, sink=progress, per_height_scale=args.per_height_scale)
            reports.append((session, result))
    if args.json:
        each = [{"session_file": str(s), "report_dir": str(r.out_dir), "files": [str(p) for p in r.paths],
                 "notes": list(r.notes)} for s, r in reports]
        # one session: its report_dir and files at the top, as always; every session's under "reports"
        top = {"report_dir": each[0]["report_dir"], "files": each[0]["files"]} if len(each) == 1 else {}
        emit_json({**top, "reports": each})
        return 0
    lines = []
    for session, r in reports:
        lines.append(f"{session}: {len(r.paths)} files in {r.out_dir}")
        lines += [f"  {p.relative_to(r.out_dir)}" for p in r.paths]
        lines += [f"  note: {n}" for n in r.notes]
    emit_text(lines)
    return 0
