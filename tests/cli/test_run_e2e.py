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
        if line.startswith("series:") or "series: " in line:
            return
        assert time.monotonic() - t0 < timeout_s, "series never started"
    raise AssertionError(f"run ended before the series: {proc.wait()}")


def test_sigkill_at_random_moments_then_resume_keeps_every_line(tmp_path):
    rng = np.random.default_rng(2024)
    for attempt in range(3):
        cwd = tmp_path / f"kill{attempt}"
        cwd.mkdir()
        # realtime pace so the series takes a few seconds: 12 lines x 5 passes at 20 lines/s per pass
        proc = _start(cwd, "run", *KILL, "--seed", "3", "--pace", "realtime", "--line-rate", "20")
        _wait_for_series(proc)
        time.sleep(float(rng.uniform(0.0, 1.2)))
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        session = next((cwd / "mfma-out").glob("session-*.h5"))
        with h5py.File(session, "r") as f:  # opens plainly after the kill
            s = f["series/series1"]
            done = int(s.attrs["completed_lines"])
            before = s["phase_deg"][..., :done, :].copy()
            topo = s["topography/topography_m"][:done, :].copy() if "topography" in s else None
            assert np.all(np.isfinite(before))
        if done == 12:
            continue  # finished before the kill: nothing to resume
        res = mfma("run", "--resume", str(session), "--seed", "3", cwd=cwd)
        assert res.returncode == 0, res.stderr
        with h5py.File(session, "r") as f:
            s = f["series/series1"]
            assert int(s.attrs["completed_lines"]) == 12 and bool(f.attrs["complete"])
            assert s["phase_deg"][..., :done, :].tobytes() == before.tobytes()
            if topo is not None:
                assert s["topography/topography_m"][:done, :].tobytes() == topo.tobytes()
            assert np.all(np.isfinite(s["phase_deg"][...]))
        again = mfma("run", "--resume", str(session), cwd=cwd)
        assert again.returncode == 2 and "already complete" in again.stderr


def test_ctrl_c_withdraws_and_exits_130(tmp_path):
    proc = _start(tmp_path, "run", *KILL, "--pace", "realtime", "--line-rate", "20")
    _wait_for_series(proc)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "withdrawn" in err


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
def test_bad_input_exit_2(tmp_path, argv, needle):
    out = mfma("run", *argv, cwd=tmp_path)
    assert out.returncode == 2, out.stderr
    assert needle in out.stderr and "Traceback" not in out.stderr
    assert len(out.stderr.strip().splitlines()) == 1


def test_resume_rejects_a_file_that_is_not_a_session(tmp_path):
    bogus = tmp_path / "bogus.h5"
    with h5py.File(bogus, "w") as f:
        f["x"] = np.arange(3)
    out = mfma("run", "--resume", str(bogus), cwd=tmp_path)
    assert out.returncode == 2 and "session" in out.stderr.lower()


def test_unwritable_output_folder(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("")
    out = mfma("run", "--out", str(blocker / "sub"), cwd=tmp_path)
    assert out.returncode == 2 and "output folder" in out.stderr
