"""Faults during ``mfma run``: the stage ends safe, every completed line is on disk, the message is clear."""

from __future__ import annotations

import subprocess
import sys
from importlib import resources
from pathlib import Path

import h5py
import numpy as np
import pytest

from drivers.registry import open_controller

DEFAULT = resources.files("simulated_stage").joinpath("scenarios/default.toml").read_text()
SMALL = ["--lines", "10", "--pixels", "32", "--heights", "10,20,40", "--thermal-seconds", "0.5"]


def scenario_with(tmp_path: Path, faults: str) -> Path:
    path = tmp_path / "faulty.toml"
    path.write_text(DEFAULT + "\n" + faults)
    return path


def run(tmp_path: Path, scenario: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "assistant", "run", *SMALL, "--scenario", str(scenario)],
                          cwd=tmp_path, capture_output=True, text=True, timeout=240)


def completed_lines(tmp_path: Path) -> tuple[int, np.ndarray]:
    session = next((tmp_path / "mfma-out").glob("session-*.h5"))
    with h5py.File(session, "r") as f:
        s = f["series/series1"]
        n = int(s.attrs["completed_lines"])
        return n, s["phase_deg"][..., :n, :]


def test_controller_error_mid_series(tmp_path):
    sc = scenario_with(tmp_path, '[faults]\nseed = 1\n[[faults.events]]\nkind = "error_code"\ncode = 333\n'
                                 'after = 4\nmethods = ["scan_line"]\nmessage = "Z amplifier overheated"\n')
    out = run(tmp_path, sc)
    assert out.returncode == 1, out.stderr
    last = out.stderr.strip().splitlines()[-1]
    assert last.startswith("mfma: error:") and "333" in last and "Z amplifier overheated" in last
    assert "tip withdrawn, drive off, bias 0 V" in out.stderr
    n, phase = completed_lines(tmp_path)
    assert n == 4 and np.all(np.isfinite(phase))


def test_full_disk_mid_series(tmp_path):
    sc = scenario_with(tmp_path, '[faults]\n[[faults.events]]\nkind = "disk_full"\nafter = 3\n')
    out = run(tmp_path, sc)
    assert out.returncode == 1, out.stderr
    assert "No space left on device" in out.stderr.strip().splitlines()[-1]
    assert "withdrawn" in out.stderr
    n, phase = completed_lines(tmp_path)
    assert n == 3 and np.all(np.isfinite(phase))


def test_laser_loss_is_reported_as_such(tmp_path):
    sc = scenario_with(tmp_path, '[faults]\n[[faults.events]]\nkind = "laser_loss"\nafter = 2\n'
                                 'methods = ["scan_line"]\n')
    out = run(tmp_path, sc)
    assert out.returncode == 1
    assert "laser" in out.stderr.strip().splitlines()[-1]
    n, _ = completed_lines(tmp_path)
    assert n == 2


def test_stage_is_safe_after_a_fault_in_process(tmp_path):
    from assistant.procedures.series import SeriesSettings, run_series
    from assistant.procedures.approach import ApproachSettings, approach
    from assistant.storage.session_file import SessionFile
    from drivers.errors import ControllerFault

    sc = scenario_with(tmp_path, '[faults]\n[[faults.events]]\nkind = "error_code"\nafter = 1\n'
                                 'methods = ["scan_line"]\n')
    with open_controller("sim://", scenario=str(sc)) as ctl:
        ctl.set_drive(75e3, 0.2)
        free = ctl.read(["amplitude_v"])["amplitude_v"]
        approach(ctl, ApproachSettings(75e3, 0.2, 0.7 * free, free))
        settings = SeriesSettings(heights_m=(20e-9, 40e-9), lines=8, pixels=16)
        with SessionFile.create(tmp_path / "s.h5", controller_url="sim://", software_version="test") as sf:
            w = sf.create_series("series1", heights_m=settings.heights_m, biases_v=None, lines=8, pixels=16,
                                 scan_size_m=settings.scan_size_m, line_rate_hz=1.0, order=settings.order,
                                 repeat_first=True, settings_json=settings.to_json())
            with pytest.raises(ControllerFault, match="injected"):
                run_series(ctl, settings, w)
        status = ctl.status()
        assert status.safe and not status.drive_on and status.bias_v == 0.0 and status.z_m == 0.0
