"""``mfma drivers``: installed controller plug-ins."""

from __future__ import annotations

from assistant.cli._common import emit_json, emit_text


def run(args) -> int:
    from drivers.registry import available

    table = available()
    rows = []
    for scheme, entry in sorted(table.items()):
        try:
            entry.load()
            state = "ok"
        except Exception as exc:  # a broken plug-in must not hide the others
            state = f"cannot load: {exc}"
        rows.append({"scheme": scheme, "target": entry.target, "origin": entry.origin, "state": state})
    if args.json:
        emit_json({"drivers": rows})
    else:
        emit_text([f"{r['scheme'] + '://':<12} {r['target']:<45} {r['origin']:<14} {r['state']}" for r in rows])
    return 0
