"""``mfma analyze loop`` and ``mfma run --fields-ka-per-m``: the outside contract (keys, exit codes, one-line
errors) and a whole field series on the simulated dot array, checked against the stage's own dots."""

from __future__ import annotations

import json
import sys
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parents[1] / "analysis"))
from synthetic_loop import loop_fields, make_loop_stack, match  # noqa: E402

from assistant.cli import main  # noqa: E402

JSON_KEYS = {"dots", "coercive_field_ka_per_m", "coercive_field_std_ka_per_m", "sfd_sigma_ka_per_m",
             "switching_fields_ka_per_m", "loop_field_ka_per_m", "loop_m_over_ms", "tip_reversals_ka_per_m",
             "tip_switched_elements", "switching_fields_step_before_ka_per_m", "sfd_sigma_std_ka_per_m",
             "tagawa_sigma_ka_per_m", "tagawa_sigma_std_ka_per_m"}


@pytest.fixture(scope="module")
def stack():
    return make_loop_stack(seed=8, rows=80, cols=80, fields=loop_fields(450e3, 50e3), drift_step_px=0.2)


def _npz(path: Path, st, **change) -> Path:
    data = {"phase_deg": st.phase_deg, "field_ka_per_m": st.field_a_per_m / 1e3, "pixel_nm": 20.0,
            "topography_m": st.topography_m}
    data.update(change)
    np.savez(path, **{k: v for k, v in data.items() if v is not None})
    return path


def _run(argv, capsys) -> tuple[int, str, str]:
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_analyze_loop_json_has_exactly_the_keys(tmp_path, stack, capsys):
    code, out, _ = _run(["analyze", "loop", str(_npz(tmp_path / "s.npz", stack)), "--json"], capsys)
    assert code == 0
    d = json.loads(out)
    assert set(d) == JSON_KEYS
    assert d["tip_reversals_ka_per_m"] == [-250.0, 250.0]
    assert d["loop_field_ka_per_m"] == (stack.field_a_per_m / 1e3).tolist()
    down = np.array([v[0] for v in d["switching_fields_ka_per_m"]], float)
    assert d["dots"] == down.size and np.all(np.isfinite(down))
    assert d["sfd_sigma_std_ka_per_m"] > 0 and d["tagawa_sigma_ka_per_m"] is None is d["tagawa_sigma_std_ka_per_m"]
    before = np.array([v[0] for v in d["switching_fields_step_before_ka_per_m"]], float)
    np.testing.assert_array_equal(before, down + 50.0)  # the step before, on the way down


def test_analyze_loop_recovers_known_switching_fields_and_writes_figures(tmp_path, stack, capsys):
    from assistant.procedures.analyse_loop import analyse_npz

    path = _npz(tmp_path / "s.npz", stack)
    code, out, _ = _run(["analyze", "loop", str(path), "--plots", str(tmp_path / "fig")], capsys)
    assert code == 0 and out.startswith("Coercive field:") and "Tip reversals:" in out and "-250 kA/m, 250 kA/m" in out
    spread = next(line for line in out.splitlines() if line.startswith("Switching-field spread:"))
    assert " ± " in spread and "kA/m (step width accounted for)" in spread
    assert "First field found reversed on each branch (the element switched between it and the step before)" in out
    assert sorted(p.name for p in (tmp_path / "fig").iterdir()) == ["elements.png", "field_steps.png", "loop.png"]
    result = analyse_npz(path)
    truth = stack.switching_a_per_m[match(result.elements.centroids_px, stack.centres_px)] / 1e3
    down = -np.array([v[0] for v in result.to_dict()["switching_fields_ka_per_m"]])
    assert np.all((down - truth >= 0) & (down - truth < 50.0))  # within one field step


@pytest.mark.parametrize("change,message", [
    ({"pixel_nm": None}, "missing key(s) pixel_nm"),
    ({"field_ka_per_m": np.arange(5.0)}, "field axis"),
    ("three", "at least 3 field steps"),
    ("noise", "no elements found"),
])
def test_analyze_loop_bad_stacks_exit_2_with_one_line(tmp_path, stack, capsys, change, message):
    if change == "three":
        change = {"phase_deg": stack.phase_deg[:2], "field_ka_per_m": stack.field_a_per_m[:2] / 1e3}
    elif change == "noise":
        change = {"phase_deg": np.random.default_rng(0).normal(0, 0.05, stack.phase_deg.shape), "topography_m": None}
    code, out, err = _run(["analyze", "loop", str(_npz(tmp_path / "s.npz", stack, **change)), "--json"], capsys)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and message in err and "Traceback" not in err


DOT_LOOP = resources.files("simulated_stage").joinpath("scenarios/dot-loop.toml").read_text()


@pytest.mark.parametrize("argv,message", [
    (["--fields-ka-per-m", "300,0"], "at least 3 field steps"),
    (["--fields-ka-per-m", "700:-700:100"], "exceeds the magnet's limit of 600 kA/m"),
    (["--fields-ka-per-m", "3000:-3000:1000"], "software limit"),
    (["--fields-ka-per-m", "300:-300:100", "--heights", "20,40"], "one lift height"),
    (["--fields-ka-per-m", "300:-300"], "START:STOP:STEP"),
    (["--fields-ka-per-m", "300:-300:100", "--field-map", "--probe", "p1"], "a field series has none to map"),
])
def test_run_with_bad_fields_exits_2_before_anything_moves(tmp_path, capsys, argv, message):
    code, out, err = _run(["run", "--scenario", "dot-loop", "--out", str(tmp_path / "o"), *argv], capsys)
    assert code == 2 and out == "" and message in err and len(err.strip().splitlines()) == 1
    assert not list(tmp_path.rglob("session-*.h5"))


def test_field_series_on_the_simulated_dot_array(tmp_path, capsys):
    # A user's run: calibrate, approach, a loop of +-440 kA/m in 40 kA/m steps, analysis, report. The dot array
    # (switching fields 300 +- 40 kA/m, tip coating reversing at 200 kA/m) on a film just large enough.
    from simulated_stage.sample import build_sample
    from simulated_stage.scenario import load_scenario

    scenario = tmp_path / "dots.toml"
    scenario.write_text(DOT_LOOP.replace("extent_um = 6.0", "extent_um = 3.5"))
    code, out, err = _run(["run", "--scenario", str(scenario), "--fields-ka-per-m", "440:-440:40", "--lines", "16",
                           "--pixels", "24", "--size-um", "1.5", "--thermal-seconds", "0.2", "--seed", "3",
                           "--out", str(tmp_path / "out"), "--json"], capsys)
    assert code == 0, err
    d = json.loads(out)
    loop = d["loop"]
    assert set(loop) == JSON_KEYS and d["field_series"]["completed_steps"] == 45
    m = loop["loop_m_over_ms"]
    assert m[0] == 1.0 and min(m) == -1.0 and m[-1] == 1.0
    # the tip's coating reverses at the first step past 200 kA/m on each branch
    assert loop["tip_reversals_ka_per_m"] == [-240.0, 240.0]
    # the stage's own dots under the elements found (the sample is built from the scenario's seed)
    s = load_scenario(str(scenario))
    dots = build_sample(s.sample, s.tip)._dots
    from assistant.procedures.analyse_loop import stored_loop_analysis
    from assistant.storage import SessionFile

    with SessionFile.open(d["session_file"], "r") as sf:
        result = stored_loop_analysis(sf, "fields1")  # the analysis the run stored whole
    pr, pc = result.pixel_m
    centres = result.elements.centroids_px
    dist = np.hypot((centres[:, 1, None] + 0.5) * pc - dots.x_m, (centres[:, 0, None] + 0.5) * pr - dots.y_m)
    truth = dots.switching_a_per_m[np.argmin(dist, axis=1)] / 1e3
    assert loop["dots"] >= 5 and np.all(dist.min(axis=1) < 100e-9)
    assert loop["coercive_field_ka_per_m"] == pytest.approx(truth.mean(), abs=3 * loop["coercive_field_std_ka_per_m"])
    # The spread of these very dots: what separates the estimate from it is only where each switching field lies
    # within its 40 kA/m step (sd w / sqrt(12) per dot, Sheppard 1898; about w / sqrt(12 (n - 1)) = 5 kA/m on the
    # spread of n = 6), well inside the reported standard error, a population's sampling error (16 kA/m here).
    assert abs(loop["sfd_sigma_ka_per_m"] - truth.std(ddof=1)) < loop["sfd_sigma_std_ka_per_m"]
    # The first step at or past each dot's own switching field; the tip's field at a dot under it (at most
    # m / (2 pi delta^3) = 9.2 kA/m for this tip in the topography pass) can bring that a step earlier. A switch
    # the images show happening under the tip is reported as such and may come earlier still.
    tip_field = 1e-16 / (2 * np.pi * (120e-9) ** 3) / 1e3
    by_tip = set(loop["tip_switched_elements"])
    for e, (down, up) in enumerate(loop["switching_fields_ka_per_m"]):
        for got in (down, up):
            if got is not None and e not in by_tip:
                assert -tip_field <= abs(got) - truth[e] < 40.0
    report = Path(d["report_dir"])
    assert {"fields1_loop.png", "fields1_elements.png", "fields1_field_steps.png"} <= {p.name for p in report.iterdir()}
    assert "## Field series" in (report / "summary.md").read_text()
    # the stored series analysed again from the session file gives the same answer
    code, out, _ = _run(["analyze", "loop", d["session_file"], "--json"], capsys)
    assert code == 0 and json.loads(out) == loop


def _partial_session(tmp_path: Path, scenario: Path, stop_after_lines: int) -> Path:
    """A field series stopped part-way (as a kill would leave it): drive settings stored, no calibration run."""
    from assistant.procedures.approach import ApproachSettings, approach
    from assistant.procedures.calibrate import DriveSettings
    from assistant.procedures.events import CancelToken, Progress
    from assistant.procedures.field_series import FieldSeriesSettings, parse_fields_ka_per_m
    from assistant.procedures.workflow import Workflow
    from drivers.registry import open_controller

    path = tmp_path / "partial.h5"
    with open_controller("sim://", scenario=str(scenario), seed=4) as ctl:
        ctl.set_drive(85e3, 0.2)
        free = ctl.read(["amplitude_v"])["amplitude_v"]
        drive = DriveSettings(85e3, 0.2, free, 20e-9, 0.7 * free, 0.7, 0.0)
        wf = Workflow(ctl, path, cancel=CancelToken())
        wf.drive, wf.spring_constant_n_per_m, wf.quality_factor, wf.temperature_k = drive, 4.0, 240.0, 298.15
        wf.approach_result = approach(ctl, ApproachSettings(85e3, 0.2, 0.7 * free, free))

        def sink(event):
            if isinstance(event, Progress) and event.done == stop_after_lines:
                wf.cancel.set()

        wf.sink = sink
        settings = FieldSeriesSettings(fields_a_per_m=tuple(f * 1e3 for f in parse_fields_ka_per_m("450:-450:225")),
                                       lines=8, pixels=16, scan_size_m=1.5e-6)
        with pytest.raises(Exception, match="cancelled"):
            wf.field_series(settings)
        wf.close()
    return path


def test_run_resume_finishes_an_interrupted_field_series(tmp_path, capsys, monkeypatch):
    import h5py

    scenario = tmp_path / "dots.toml"
    scenario.write_text(DOT_LOOP.replace("extent_um = 6.0", "extent_um = 3.0"))
    path = _partial_session(tmp_path, scenario, stop_after_lines=3 * 8 + 5)
    with h5py.File(path, "r") as f:
        before = f["field_series/fields1/phase_deg"][:3].copy()
        assert int(f["field_series/fields1"].attrs["completed_lines"]) == 29
    from assistant.procedures.workflow import ResumePlan

    plan = ResumePlan.read(path)  # what `run --resume` hands to Workflow.resume
    assert plan.is_field_series and plan.completed_lines == 29 and plan.where == "field step 4 of 9, line 6 of 8"
    assert plan.series.fields_a_per_m[:3] == (450e3, 225e3, 0.0) and plan.spring_constant_n_per_m == 4.0
    code, out, err = _run(["run", "--resume", str(path), "--scenario", str(scenario), "--json"], capsys)
    assert code == 0, err
    d = json.loads(out)
    assert d["field_series"]["completed_steps"] == 9 and d["loop"]["tip_reversals_ka_per_m"] == [-225.0, 225.0]
    assert "resuming" in err and "retracing the fields 450" in err
    with h5py.File(path, "r+") as f:
        g = f["field_series/fields1"]
        assert int(g.attrs["completed_lines"]) == 72 and bool(f.attrs["complete"])
        assert list(g.attrs["resumed_at_lines"]) == [29]  # the seam, said at the analysis as well
        assert "'fields1' was resumed at field step 4, line 6 of 8 lines per image" in err
        assert g["phase_deg"][:3].tobytes() == before.tobytes()
        f.attrs["complete"] = False  # as if stopped while the report was written: only the analysis is left
    from matplotlib.figure import Figure

    monkeypatch.setattr(Figure, "savefig", lambda self, *a, **k: None)  # drawn above; the stage is under test here
    code, out, err = _run(["run", "--resume", str(path), "--controller", "sim://?scenario=nowhere", "--json"], capsys)
    assert code == 0 and "every line is written" in err, err  # no instrument is opened for it
    assert json.loads(out)["loop"]["tip_reversals_ka_per_m"] == [-225.0, 225.0]


@pytest.mark.slow
def test_a_tip_close_to_the_film_switches_elements_and_is_reported(tmp_path, capsys):
    # The same tip moment 60 nm behind the apex instead of 120 nm: its field at a dot under it in the topography
    # pass is m / (2 pi delta^3) = 74 kA/m, enough to reverse dots within that of their own switching field.
    scenario = tmp_path / "close-tip.toml"
    scenario.write_text(DOT_LOOP.replace("extent_um = 6.0", "extent_um = 3.5")
                        .replace("effective_distance_nm = 120.0", "effective_distance_nm = 60.0"))
    code, out, err = _run(["run", "--scenario", str(scenario), "--fields-ka-per-m", "450:-450:30", "--lines", "16",
                           "--pixels", "24", "--size-um", "1.5", "--thermal-seconds", "0.2", "--seed", "3",
                           "--out", str(tmp_path / "out"), "--json"], capsys)
    assert code == 0, err
    loop = json.loads(out)["loop"]
    assert len(loop["tip_switched_elements"]) >= 2
    assert "switched" in err and "lower-moment tip" in err


def test_analyze_loop_of_a_stack_file_loads_no_hdf5_library_nor_scipy_optimize(tmp_path, stack):
    # h5py (0.03 s to load) is for session files only; a .npz stack is read with numpy alone. scipy.optimize
    # (0.13-0.2 s to load, measured as whole processes) is not needed: the fits have their own two minimisers
    import os
    import subprocess

    code = ("import sys, io, contextlib\n"
            "from assistant.cli import main\n"
            "with contextlib.redirect_stdout(io.StringIO()):\n"
            "    assert main(['analyze', 'loop', sys.argv[1], '--json']) == 0\n"
            "print([m for m in ('h5py', 'scipy.optimize') if m in sys.modules])\n")
    out = subprocess.run([sys.executable, "-c", code, str(_npz(tmp_path / "s.npz", stack))], capture_output=True,
                         text=True, check=True, cwd=Path(__file__).parents[2],
                         env={**os.environ, "MFMA_DATA_DIR": str(tmp_path / "data")})
    assert out.stdout.strip().splitlines()[-1] == "[]", out.stdout + out.stderr
