"""Resume re-establishes the instrument from the session file and the controller, never from an assumption about
where the motor was left; what is left to do is read from the file; a drive that cannot engage the lever is
refused before anything moves."""

from __future__ import annotations

import json

import h5py
import pytest

from assistant.cli import main
from assistant.procedures.approach import ApproachSettings, ApproachSettingsError, approach
from assistant.procedures.calibrate import CalibrationSettings
from assistant.procedures.events import Cancelled, Progress
from assistant.procedures.resume import (InstrumentMismatch, ResumeError, read_resume_plan, reestablish_drive,
                                         run_plan_json)
from assistant.procedures.series import SeriesSettings
from assistant.procedures.workflow import Workflow
from assistant.storage import FinishedSeriesError, SessionFile, SessionFileError
from drivers.registry import open_controller

# the scenario of the report: a lever that is not the default one (k, f0, Q, InvOLS), nothing else
PROBE_ONLY = """[probe]
spring_constant_n_per_m = 2.2
resonance_hz = 71000
quality_factor = 210
invols_nm_per_v = 62

[environment]
temperature_k = 296
"""
# a small sample only to keep the stray-field maps cheap (the lever is what the resume is about)
SMALL_SAMPLE = "\n[sample]\nextent_um = 2.0\npixel_nm = 20.0\n"
SERIES = SeriesSettings(heights_m=(10e-9, 20e-9, 30e-9, 50e-9), lines=8, pixels=16, scan_size_m=1e-6)


@pytest.fixture(scope="module")
def interrupted(tmp_path_factory):
    """A session recorded on the probe-only scenario, stopped after three of eight lines."""
    folder = tmp_path_factory.mktemp("interrupted")
    scenario = folder / "probe.toml"
    scenario.write_text(PROBE_ONLY + SMALL_SAMPLE)
    path = folder / "session.h5"
    with open_controller("sim://", scenario=str(scenario), seed=1) as ctl:
        wf = Workflow(ctl, path, scenario_text=ctl.scenario_text)

        def stop_after_three(event):
            if isinstance(event, Progress) and event.what == "series" and event.done == 3:
                wf.cancel.set()

        wf.sink = stop_after_three
        wf.calibrate(CalibrationSettings(thermal_seconds=0.3))
        wf.approach()
        with pytest.raises(Cancelled):
            wf.series(SERIES)
        wf.close()
        assert ctl.status().safe
    return path


def test_resume_point_of_an_interrupted_series(interrupted):
    p = read_resume_plan(interrupted)
    assert (p.stage, p.completed_lines, p.series.heights_m) == ("scan", 3, SERIES.heights_m)
    assert p.drive is not None and p.drive.frequency_hz == pytest.approx(71000, rel=0.01)
    assert "resonance_hz = 71000" in p.scenario_text


@pytest.mark.slow  # the same resume, after a real SIGKILL, runs by default in tests/cli/test_run_e2e.py
def test_resume_on_the_recorded_stage_finishes(interrupted, tmp_path, capsys):
    # the reported failure: the resume drove a new default stage with the stored drive, the feedback pulled Z
    # back at once, the approach took that for a surface and re-centred the coarse motor to -5 µm
    path = tmp_path / "copy.h5"
    path.write_bytes(interrupted.read_bytes())
    with h5py.File(path, "r") as f:
        before = f["series/series1/phase_deg"][..., :3, :].tobytes()
    assert main(["run", "--resume", str(path), "--json"]) == 0, capsys.readouterr().err
    out, err = capsys.readouterr()
    d = json.loads(out)
    assert d["series"]["completed_lines"] == 8
    assert "series 'series1' was resumed at line 4 of 8 lines per image" in err  # the seam is said
    with h5py.File(path, "r") as f:
        assert bool(f.attrs["complete"]) and f["series/series1/phase_deg"][..., :3, :].tobytes() == before
        assert list(f["series/series1"].attrs["resumed_at_lines"]) == [3]


def test_resume_on_another_lever_is_refused_before_anything_moves(interrupted, tmp_path, capsys):
    path = tmp_path / "copy.h5"
    path.write_bytes(interrupted.read_bytes())
    default_lever = tmp_path / "default-lever.toml"  # the recorded sample under the default lever
    default_lever.write_text(SMALL_SAMPLE)
    assert main(["run", "--resume", str(path), "--scenario", str(default_lever)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("mfma: error:") and "free amplitude" in err[-1] and "recorded" in err[-1]
    with h5py.File(path, "r") as f:
        assert int(f["series/series1"].attrs["completed_lines"]) == 3 and not bool(f.attrs["complete"])


@pytest.mark.parametrize("sample", ["pattern = \"dots\"", "seed = 2"])
def test_resume_on_another_sample_is_refused_before_anything_moves(interrupted, tmp_path, capsys, monkeypatch,
                                                                   sample):
    # the same lever drives as stored, so only the scenario itself tells that the lines would be of another sample
    path = tmp_path / "copy.h5"
    path.write_bytes(interrupted.read_bytes())
    other = tmp_path / "other-sample.toml"
    other.write_text(PROBE_ONLY + SMALL_SAMPLE + sample + "\n")
    assert main(["run", "--resume", str(path), "--scenario", str(other)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("mfma: error: --scenario") and "sample differs" in err[-1], err[-3:]
    assert "Traceback" not in "\n".join(err)
    with h5py.File(path, "r") as f:
        assert int(f["series/series1"].attrs["completed_lines"]) == 3 and not bool(f.attrs["complete"])
    from matplotlib.figure import Figure

    monkeypatch.setattr(Figure, "savefig", lambda self, *a, **k: None)  # the resume is under test, not the figures
    same = tmp_path / "same.toml"  # the recorded scenario's text from a file of its own is accepted
    same.write_text(PROBE_ONLY + SMALL_SAMPLE)
    assert main(["run", "--resume", str(path), "--scenario", str(same), "--json"]) == 0, capsys.readouterr().err


def test_resume_refuses_options_that_would_change_the_stored_series(interrupted, tmp_path, capsys):
    # they used to be dropped without a word: --lines 64 --heights 10,20 gave the stored 8 lines at four heights
    path = tmp_path / "copy.h5"
    path.write_bytes(interrupted.read_bytes())
    assert main(["run", "--resume", str(path), "--lines", "64", "--heights", "10,20", "--size-um", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("mfma: error: --heights, --lines:") and "copy.h5" in err[0], err
    with h5py.File(path, "r") as f:
        assert int(f["series/series1"].attrs["completed_lines"]) == 3 and not bool(f.attrs["complete"])
    from assistant.cli.parser import build_parser
    from assistant.cli.resume_options import changed_options

    plan = read_resume_plan(path)
    for argv, changed in ((["--lines", "8", "--pixels=16", "--heights", "10,20,30,50", "--size-um", "1"], []),
                          (["--biases", "0", "--line-rate", "1", "--no-repeat"], ["--no-repeat"]),
                          (["--pix", "32", "--biases=-1,0,1"], ["--biases", "--pixels"]),
                          (["--fields-ka-per-m", "100,0"], ["--fields-ka-per-m"]),
                          (["--thermal-seconds", "2"], ["--thermal-seconds"])):  # no run plan stored to compare
        args = build_parser().parse_args(["run", "--resume", str(path), *argv])
        assert changed_options(args, plan, argv) == changed, argv


def test_reestablish_measures_the_drive_and_leaves_the_coarse_motor_alone(interrupted):
    p = read_resume_plan(interrupted)
    from simulated_stage.scenario import Scenario

    with open_controller("sim://", scenario=Scenario.from_text(p.scenario_text)) as ctl:
        ctl.step_coarse(40)  # wherever a stopped run left the motor
        at = ctl.status().coarse_position_m
        got = reestablish_drive(ctl, p.drive)
        assert got["amplitude_ratio"] == pytest.approx(1.0, abs=0.05)
        assert got["coarse_position_m"] == at == ctl.status().coarse_position_m
    with open_controller("sim://") as ctl, pytest.raises(InstrumentMismatch, match="free amplitude"):
        reestablish_drive(ctl, p.drive)


def test_approach_refuses_a_setpoint_the_free_lever_cannot_reach():
    with open_controller("sim://", seed=2) as ctl:
        with pytest.raises(ApproachSettingsError, match="below the setpoint"):
            approach(ctl, ApproachSettings(75e3, 0.01, setpoint_v=0.5, free_amplitude_v=0.6))
        status = ctl.status()
        assert status.coarse_position_m == 0.0 and status.safe


def test_what_is_left_is_read_from_the_file(tmp_path, interrupted):
    plan_only = tmp_path / "plan.h5"  # stopped during the calibration: only the plan is there
    SessionFile.create(plan_only, controller_url="sim://", software_version="test", run_plan_json=run_plan_json(
        SERIES, CalibrationSettings(thermal_seconds=0.3), probe_record=False)).close()
    p = read_resume_plan(plan_only)
    assert p.stage == "start" and p.calibration.thermal_seconds == 0.3 and p.series == SERIES
    bare = tmp_path / "bare.h5"
    SessionFile.create(bare, controller_url="sim://", software_version="test").close()
    with pytest.raises(SessionFileError, match="no series to resume"):
        read_resume_plan(bare)
    finished = tmp_path / "finished.h5"  # every line written, the analysis not: no motion left to do
    finished.write_bytes(interrupted.read_bytes())
    with h5py.File(finished, "r+") as f:
        f["series/series1"].attrs.modify("completed_lines", 8)
    assert read_resume_plan(finished).stage == "analyse"
    with h5py.File(finished, "r+") as f:
        f.attrs["complete"] = True
    with pytest.raises(FinishedSeriesError, match="already complete"):
        read_resume_plan(finished)


def test_what_is_left_of_a_field_series_is_read_from_the_file(tmp_path):
    from assistant.procedures.field_series import FieldSeriesSettings

    fields = FieldSeriesSettings(fields_a_per_m=(3e5, 0.0, -3e5), lines=2, pixels=4, scan_size_m=1e-6)
    plan_only = tmp_path / "plan.h5"  # a field-series run stopped during its calibration
    SessionFile.create(plan_only, controller_url="sim://", software_version="test", run_plan_json=run_plan_json(
        fields, CalibrationSettings(thermal_seconds=0.3), probe_record=True)).close()
    p = read_resume_plan(plan_only)
    assert (p.stage, p.is_field_series, p.series, p.probe_record) == ("start", True, fields, True)
    written = tmp_path / "written.h5"  # every line of every field step written, the loop analysis not
    stored = json.dumps({**fields.to_dict(), "drive": None, "spring_constant_n_per_m": 2.0,
                         "quality_factor": 200.0, "temperature_k": 296.0})
    with SessionFile.create(written, controller_url="sim://", software_version="test") as sf:
        sf.create_field_series(fields.name, fields_a_per_m=fields.fields_a_per_m, lines=2, pixels=4,
                               scan_size_m=1e-6, line_rate_hz=1.0, lift_height_m=50e-9, repeat_first=False,
                               order="per step", settings_json=stored)
    with h5py.File(written, "r+") as f:
        f[f"field_series/{fields.name}"].attrs.modify("completed_lines", 6)
    p = read_resume_plan(written)
    assert (p.stage, p.is_field_series, p.completed_lines, p.spring_constant_n_per_m) == ("analyse", True, 6, 2.0)
    with h5py.File(written, "r+") as f:
        f[f"field_series/{fields.name}"].attrs.modify("completed_lines", 3)
    with pytest.raises(ResumeError, match="stores no drive settings"):  # lines to scan, but no drive to scan them
        read_resume_plan(written)
    with h5py.File(written, "r+") as f:
        f.attrs["complete"] = True
    with pytest.raises(FinishedSeriesError, match="field series 'fields1' .* is already complete"):
        read_resume_plan(written)
