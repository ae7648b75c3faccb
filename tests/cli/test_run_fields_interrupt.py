"""Ctrl-C between two steps of ``mfma run --fields-ka-per-m`` (no procedure guard running: here right after the
approach, with the tip engaged) still stops the stage through ``abort()`` and exits 130."""

from __future__ import annotations

import pytest

from assistant.cli import main
from assistant.procedures.workflow import Workflow


def test_ctrl_c_after_the_approach_withdraws_and_exits_130(tmp_path, capsys, monkeypatch):
    seen = {}

    def interrupted(self, settings, **kwargs):
        seen["engaged"] = self.controller.status().engaged
        seen["controller"] = self.controller
        raise KeyboardInterrupt  # the signal lands before the field series' guard is entered

    monkeypatch.setattr(Workflow, "field_series", interrupted)
    code = main(["run", "--scenario", "dot-loop", "--fields-ka-per-m", "300,0,-300", "--lines", "8", "--pixels", "8",
                 "--size-um", "1", "--thermal-seconds", "0.2", "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 130, err
    assert seen["engaged"] is True  # the approach left the tip on the surface
    assert seen["controller"].status().safe and "interrupted; the stage was made safe" in err


def test_ctrl_c_where_no_controller_is_open_claims_no_safe_stage(monkeypatch, capsys):
    # nothing was opened, so nothing was made safe: the last line says only that the command was interrupted
    import assistant.cli.cmd_drivers as drivers_cmd

    def interrupted(args):
        raise KeyboardInterrupt

    monkeypatch.setattr(drivers_cmd, "run", interrupted)
    code = main(["drivers"])
    err = capsys.readouterr().err
    assert code == 130
    assert err.strip() == "mfma: interrupted"
