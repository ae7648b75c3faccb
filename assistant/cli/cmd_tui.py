"""``mfma tui``: the terminal user interface over the same workflow as ``mfma run``."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, open_controller_from_args


def run(args) -> int:
    from assistant.outputs import new_session_path
    from assistant.procedures.guard import load_limits

    if args.open:
        return _open(Path(args.open))
    limits = load_limits()
    session_path = new_session_path(args.out)
    import contextlib

    from assistant.tui.app import MfmApp

    # The controller opens in a thread once the first screen is drawn (assistant.tui.connect); this stack closes
    # it here, after the app, whatever happened.
    with contextlib.ExitStack() as stack:
        app = MfmApp(None, controller_url=args.controller, session_path=session_path, limits=limits,
                     connect=lambda: stack.enter_context(open_controller_from_args(args)))
        try:
            app.run()
            code = app.return_code  # 1 after a crash of the UI, whatever run() returned
        finally:
            ctl = app.connection_result(timeout_s=120.0)  # waits for the thread; raises what opening raised
            # The app only exits on its own once the stage is confirmed safe; make sure of it on any exit (the
            # status alone would not say whether a magnet's field is off, and a link fault could keep it silent).
            try:
                if ctl is not None:
                    from assistant.procedures.guard import stop_now

                    stop_now(ctl)
            finally:
                if app.workflow is not None:
                    app.workflow.close()
    return int(code or 0)


def _open(path: Path) -> int:
    """Check the file before any screen opens: a missing or foreign file is one line and exit 2."""
    if not path.is_file():
        raise UsageError(f"session file {path} does not exist")
    from assistant.tui.session_view import load_session

    from assistant.storage import NotASessionFileError

    try:
        stored = load_session(path)
    except NotASessionFileError:  # not HDF5, or HDF5 that mfma did not write
        raise UsageError(f"{path} is not a session file written by mfma") from None
    except Exception as exc:
        from assistant.cli._common import one_line

        raise UsageError(f"{path} cannot be read as a session file: {one_line(exc)}") from None
    from assistant.tui.app import MfmApp

    app = MfmApp(None, open_path=path, stored=stored)
    app.run()
    return int(app.return_code or 0)
