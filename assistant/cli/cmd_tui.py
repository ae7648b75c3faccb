"""``mfma tui``: the terminal user interface over the same workflow as ``mfma run``."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

from assistant.cli._common import UsageError, open_controller_from_args


def run(args) -> int:
    from assistant.procedures.guard import load_limits
    from assistant.tui.app import MfmApp

    if args.open:
        path = Path(args.open)
        if not path.is_file():
            raise UsageError(f"session file {path} does not exist")
        app = MfmApp(None, open_path=path)
        return int(app.run() or 0)
    limits = load_limits()
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    session_path = Path("mfma-out") / f"session-{stamp}.h5"
    with open_controller_from_args(args) as ctl:
        app = MfmApp(ctl, controller_url=args.controller, session_path=session_path, limits=limits,
                     scenario_text=getattr(ctl, "scenario_text", None))
        code = app.run()
        # The app only exits on its own once the stage is confirmed safe; make sure of it on any other exit.
        try:
            if not ctl.status().safe:
                ctl.make_safe()
        finally:
            if app.workflow is not None:
                app.workflow.close()
    return int(code or 0)
