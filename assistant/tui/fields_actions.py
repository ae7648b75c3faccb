"""What the app does for the field-series view (mixed into ``MfmApp``): check, start and analyse a field series,
and show the field series of a session file that is opened for viewing."""

from __future__ import annotations

from pathlib import Path

from textual import work

from assistant.tui.bridge import StepFinished


class FieldSeriesActions:
    """Intents of the Fields view; relies on the app's ``workflow``, ``controller``, ``limits``, ``_run``."""

    def check_field_series(self, settings) -> None:
        """The procedure's own checks; with a controller also its magnet and limits (raises with the reason)."""
        from assistant.procedures.field_series import check_controller

        if self.controller is None:
            settings.validate(self.limits)
        else:
            check_controller(self.controller, settings, self.limits)

    def start_field_series(self, settings) -> None:
        wf = self.workflow
        if self._run("field series", lambda: wf.field_series(settings)):
            self.view("fields").begin(fields_a_per_m=settings.fields_a_per_m, lines=settings.lines,
                                      pixels=settings.pixels)

    def start_loop_analysis(self) -> None:
        if self.workflow is None and self.open_path is not None:
            self._stored_loop_worker(self.open_path)
            return
        wf = self.workflow
        self._run("analyse loop", lambda: wf.analyse_loop())

    @work(thread=True, group="procedure", exit_on_error=False)
    def _stored_loop_worker(self, path: Path) -> None:
        from assistant.procedures.analyse_loop import stored_loop_analysis
        from assistant.storage import SessionFile

        try:
            with SessionFile.open(path, "r") as sf:
                names = sf.field_series_names()
                result = stored_loop_analysis(sf, names[-1])
        except Exception as exc:
            self.post_message(StepFinished("analyse loop", None, exc))
            return
        self.post_message(StepFinished("analyse loop", result))

    def show_field_series_file(self, path: Path) -> None:
        """Load the last field series of a session file into the Fields view with its stored analysis (or one made
        now, not written)."""
        from assistant.storage import SessionFile

        try:
            with SessionFile.open(path, "r") as sf:
                names = sf.field_series_names()
                if not names:
                    return
                data = sf.read_field_series(names[-1])
        except Exception as exc:
            self.say("error", f"cannot read the field series of {path}: {exc}")
            return
        self.view("fields").load(data)
        self.action_view("fields")
        if data.completed_steps >= 3:
            self.start_loop_analysis()
