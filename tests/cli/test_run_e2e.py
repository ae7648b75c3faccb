"""``mfma run`` end to end, as a user runs it: the session file, the report, kills and resume, bad input."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from assistant.cli import main

SMALL = ["--lines", "12", "--pixels", "64", "--heights", "10,20,40,80", "--thermal-seconds", "0.5"]
# a lighter run for the repeated kill test: one bias, three heights
KILL = ["--lines", "12", "--pixels", "32", "--heights", "10,20,40", "--biases", "0", "--thermal-seconds", "0.5"]


def mfma(*argv: str, cwd: Path, timeout: float = 240) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "assistant", *argv], capture_output=True, text=True, cwd=cwd,
                          timeout=timeout)


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory):
    cwd = tmp_path_factory.mktemp("run")
    out = mfma("run", *SMALL, "--seed", "5", "--json", cwd=cwd)
    assert out.returncode == 0, out.stderr
    return cwd, json.loads(out.stdout)


def test_json_summary_has_the_contract_keys(finished_run):
    _, d = finished_run
    assert set(d) >= {"session_file", "report_dir", "calibration", "series", "analysis"}
    assert set(d["calibration"]) >= {"k_n_per_m", "k_std_n_per_m", "f0_hz", "q", "invols_nm_per_v"}
    assert d["series"] == {"heights_nm": [10.0, 20.0, 40.0, 80.0], "completed_lines": 12}
    a = d["analysis"]
    for key in ("heights_nm", "magnetic_rms_deg", "electrostatic_mean_deg", "short_range_mean_deg",
                "residual_rms_deg", "drift_px", "cpd_v", "recommended_lift_nm"):
        assert key in a
    # the default film is hard: the tip neither rewrites it nor pulls on it
    assert a["interaction_regime"] == "negligible", a["interaction_evidence"]


def test_session_file_opens_plainly_and_is_complete(finished_run):
    cwd, d = finished_run
    with h5py.File(cwd / d["session_file"], "r") as f:
        assert bool(f.attrs["complete"])
        s = f["series/series1"]
        assert s["phase_deg"].shape == (4, 4, 12, 64)  # heights, biases (the default grid), lines, pixels
        assert int(s.attrs["completed_lines"]) == 12
        assert np.all(np.isfinite(s["phase_deg"][...]))
        assert s["phase_deg"].attrs["units"] == "deg"
        assert "probe" in f and "analysis" in f
        assert f.attrs["controller_url"] == "sim://"


def test_report_folder_has_figures_and_summary(finished_run):
    cwd, d = finished_run
    report = cwd / d["report_dir"]
    pngs = sorted(p.name for p in report.rglob("*.png"))
    assert len(pngs) >= 4, pngs
    summary = (report / "summary.md").read_text()
    assert summary.count("N/m") >= 1
    # the default film is a coupon with written tracks: the media section reads them
    assert "## Media: orientation and recorded tracks" in summary and "Tip-sample interaction" in summary


def _start(cwd: Path, *argv: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "assistant", *argv], cwd=cwd, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)


def _wait_for_series(proc: subprocess.Popen, timeout_s: float = 120) -> None:
    t0 = time.monotonic()
    for line in proc.stderr:
        if line.startswith("series ") and " of " in line:  # "series 1 of 12 lines", the plain progress line
            return
        assert time.monotonic() - t0 < timeout_s, "series never started"
    raise AssertionError(f"run ended before the series: {proc.wait()}")


# The report's scenario: a lever that is not the default one, nothing else (a small sample and a coarse motor that
# starts 12 µm from the surface only keep the stray-field maps and the realtime approach short). Resuming a file recorded on it drove a new default stage with the stored drive and failed in the
# approach ("coarse position = -5.0e-06 m is outside the allowed range").
PROBE_ONLY = """[probe]
spring_constant_n_per_m = 2.2
resonance_hz = 71000
quality_factor = 210
invols_nm_per_v = 62

[environment]
temperature_k = 296

[instrument]
start_gap_um = 12.0

[sample]
extent_um = 6.0
pixel_nm = 20.0
"""


def test_sigkill_mid_series_then_resume_keeps_every_line(tmp_path, capsys, monkeypatch):
    # one kill in the default suite; tests/cli/test_kill_resume.py (slow) draws many, by SIGKILL and Ctrl-C, at
    # both paces, on sim:// and over both links, at moments from the start-up to the report
    from tests.cli.kill_resume import without_pngs

    without_pngs(monkeypatch)
    scenario = tmp_path / "probe.toml"
    scenario.write_text(PROBE_ONLY)
    rng = np.random.default_rng(2024)
    # realtime pace: 20 lines x 5 passes at 20 lines/s, 5 s
    proc = _start(tmp_path, "run", *KILL, "--lines", "20", "--scenario", str(scenario), "--pace", "realtime",
                  "--line-rate", "20")
    for line in proc.stderr:  # the tip engaged: the series starts now (notices are written at once)
        if line.startswith("engaged:"):
            break
    time.sleep(float(rng.uniform(0.5, 2.5)))
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    session = next((tmp_path / "mfma-out").glob("session-*.h5"))
    with h5py.File(session, "r") as f:  # opens plainly after the kill
        s = f["series/series1"]
        done = int(s.attrs["completed_lines"])
        before = {k: s[k][..., :done, :].copy() for k in ("phase_deg", "amplitude_v", "topography_m")}
        assert all(np.all(np.isfinite(v)) for v in before.values())
    assert 0 < done < 20
    # resumed in this process, without --scenario: the stage is rebuilt from the scenario stored in the file
    assert main(["run", "--resume", str(session)]) == 0, capsys.readouterr().err
    assert "drive re-established" in capsys.readouterr().err
    with h5py.File(session, "r") as f:
        s = f["series/series1"]
        assert int(s.attrs["completed_lines"]) == 20 and bool(f.attrs["complete"])
        for key, old in before.items():
            assert s[key][..., :done, :].tobytes() == old.tobytes()
        assert np.all(np.isfinite(s["phase_deg"][...]))
    assert main(["run", "--resume", str(session)]) == 2
    assert "already complete" in capsys.readouterr().err


def test_ctrl_c_the_moment_the_session_file_appears_leaves_it_resumable(tmp_path, capsys, monkeypatch):
    # the slow kill trials once found a file that had been created but not yet given its run plan when the Ctrl-C
    # came: "has no series to resume and no run plan to start one from". The plan is now written with the file
    from assistant.storage.session_file import SessionFile
    from tests.cli.kill_resume import without_pngs

    without_pngs(monkeypatch)
    real_create = SessionFile.create.__func__

    def create_then_interrupt(cls, *args, **kwargs):
        real_create(cls, *args, **kwargs).close()
        raise KeyboardInterrupt  # as if Ctrl-C came the instant the file existed

    monkeypatch.setattr(SessionFile, "create", classmethod(create_then_interrupt))
    monkeypatch.chdir(tmp_path)
    assert main(["run", *KILL, "--seed", "3"]) == 130
    assert "withdrawn" in capsys.readouterr().err
    monkeypatch.setattr(SessionFile, "create", classmethod(real_create))
    session = next((tmp_path / "mfma-out").glob("session-*.h5"))
    assert main(["run", "--resume", str(session)]) == 0, capsys.readouterr().err
    with h5py.File(session, "r") as f:
        assert bool(f.attrs["complete"]) and int(f["series/series1"].attrs["completed_lines"]) == 12


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM, signal.SIGHUP], ids=["ctrl-c", "kill", "hangup"])
def test_ctrl_c_withdraws_and_exits_130(tmp_path, signum):
    # 64 lines x 5 passes at 10 lines/s: the series lasts 32 s, so the Ctrl-C sent after its first line always
    # lands in it (the stage's realtime clock no longer runs the series at full speed after a slow start).
    # A `kill` (SIGTERM) and a closed terminal (SIGHUP) stop it the same way; by default they end Python at once.
    from tests.cli.kill_resume import quick_scenario  # a one-cycle approach: the series starts sooner

    proc = _start(tmp_path, "run", *KILL, "--lines", "64", "--scenario", str(quick_scenario(tmp_path)),
                  "--pace", "realtime", "--line-rate", "10")
    _wait_for_series(proc)
    proc.send_signal(signum)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "withdrawn" in err
    with h5py.File(next((tmp_path / "mfma-out").glob("session-*.h5")), "r") as f:
        assert 0 < int(f["series/series1"].attrs["completed_lines"]) < 64


@pytest.mark.parametrize("argv, needle", [
    (["--heights", "20,10"], "increasing"),
    (["--heights=-5,10"], "positive"),
    (["--heights", "10,20,90000"], "exceeds"),
    (["--pixels", "4"], "pixels"),
    (["--lines", "5"], "lines"),
    (["--biases", "0,1"], "three biases"),
    (["--biases", "0,0,1"], "distinct"),
    (["--resume", "nothing.h5"], "does not exist"),
    (["--scenario", "no-such-scenario"], "no-such-scenario"),
])
def test_bad_input_exit_2(tmp_path, capsys, argv, needle):
    out = tmp_path / "out"
    assert main(["run", *argv, "--out", str(out)]) == 2  # in this process: the checks need no interpreter start
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert not out.exists() or not any(out.iterdir())  # nothing written before the checks


def test_resume_rejects_a_file_that_is_not_a_session(tmp_path, capsys):
    bogus = tmp_path / "bogus.h5"
    with h5py.File(bogus, "w") as f:
        f["x"] = np.arange(3)
    assert main(["run", "--resume", str(bogus)]) == 2
    assert "session" in capsys.readouterr().err.lower()


def test_unwritable_output_folder(tmp_path, capsys):
    blocker = tmp_path / "file"
    blocker.write_text("")
    assert main(["run", "--out", str(blocker / "sub")]) == 2
    assert "output folder" in capsys.readouterr().err
