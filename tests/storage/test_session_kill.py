"""SIGKILL a real writer process at random moments: the file must open plainly with every completed line.

After each kill the file is opened with a plain ``h5py.File(path, "r")``; every line counted in
``completed_lines`` must equal what the writer wrote, at least every line the writer had acknowledged must be
counted, and lines beyond the one in progress must still be the NaN fill. A resume then writes the rest, and the
result must be byte-identical to a series written without interruption.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

import assistant

pytestmark = pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs POSIX SIGKILL")

LINES, PIXELS, HEIGHTS = 40, 256, 7
REPO = str(Path(assistant.__file__).resolve().parents[1])

# The writer: creates or resumes series "s", writes the remaining lines as fast as it can and acknowledges
# each one on stdout after write_line returned (that is, after the flush).
WRITER = r"""
import sys, numpy as np
from assistant.storage import SessionFile, resume_writer
path, mode, lines, pixels, heights = sys.argv[1], sys.argv[2], *map(int, sys.argv[3:6])
def line(i):
    rng = np.random.default_rng([2024, i])
    return dict(topography_m=rng.normal(0, 2e-9, pixels), phase_deg=rng.normal(0, 1, (heights, pixels)),
                amplitude_v=rng.normal(1, 0.01, (heights, pixels)), repeat_phase_deg=rng.normal(0, 1, pixels))
if mode == "create":
    s = SessionFile.create(path, controller_url="sim://", software_version="test")
    w = s.create_series("s", heights_m=np.arange(1, heights + 1) * 10e-9, biases_v=None, lines=lines,
                        pixels=pixels, scan_size_m=5e-6, line_rate_hz=1.0, order="topography,heights",
                        repeat_first=True, settings_json='{"seed": 2024}')
else:
    s = SessionFile.open(path, "a")
    w = resume_writer(s, "s")
print("start", w.completed_lines, flush=True)
for i in range(w.completed_lines, lines):
    w.write_line(i, **line(i))
    print("done", i, flush=True)
s.mark_complete()
s.close()
print("finished", flush=True)
"""


def _expected_line(i: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng([2024, i])  # the same stream as the writer's
    return dict(topography_m=rng.normal(0, 2e-9, PIXELS), phase_deg=rng.normal(0, 1, (HEIGHTS, PIXELS)),
                amplitude_v=rng.normal(1, 0.01, (HEIGHTS, PIXELS)), repeat_phase_deg=rng.normal(0, 1, PIXELS))


def _start(path: Path, mode: str) -> subprocess.Popen[str]:
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-c", WRITER, str(path), mode, str(LINES), str(PIXELS), str(HEIGHTS)],
                            stdout=subprocess.PIPE, text=True, env=env)


def _run_and_kill(path: Path, mode: str, kill_after: int, delay_s: float) -> int:
    """Start a writer, SIGKILL it ``delay_s`` after its ``kill_after``-th acknowledged line; return the acks."""
    proc = _start(path, mode)
    assert proc.stdout is not None
    acked = 0
    try:
        first = proc.stdout.readline()
        assert first.startswith("start"), first
        while acked < kill_after:
            text = proc.stdout.readline()
            if not text.startswith("done"):
                break
            acked += 1
        time.sleep(delay_s)  # a real process racing a real signal: the point of this test
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
        proc.stdout.close()
    return acked


def _check_plain_open(path: Path, acked_total: int) -> int:
    with h5py.File(path, "r") as f:
        g = f["series/s"]
        done = int(g.attrs["completed_lines"])
        assert acked_total <= done <= LINES
        for i in range(done):
            ref = _expected_line(i)
            assert g["topography_m"][i].tobytes() == ref["topography_m"].tobytes()
            assert g["phase_deg"][:, i, :].tobytes() == ref["phase_deg"].tobytes()
            assert g["amplitude_v"][:, i, :].tobytes() == ref["amplitude_v"].tobytes()
            assert g["repeat_phase_deg"][i].tobytes() == ref["repeat_phase_deg"].tobytes()
        # the line in progress at the kill may be partly written; every later one is untouched
        assert np.isnan(g["phase_deg"][:, done + 1:, :]).all()
        assert np.isnan(g["topography_m"][done + 1:]).all()
    return done


def _datasets(path: Path) -> dict[str, bytes]:
    with h5py.File(path, "r") as f:
        g = f["series/s"]
        return {name: g[name][()].tobytes() for name in ("topography_m", "phase_deg", "amplitude_v",
                                                         "repeat_phase_deg")}


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> dict[str, bytes]:
    path = tmp_path_factory.mktemp("ref") / "ref.h5"
    proc = _start(path, "create")
    out, _ = proc.communicate(timeout=60)
    assert proc.returncode == 0 and out.strip().endswith("finished")
    return _datasets(path)


@pytest.mark.parametrize("seed", [11, 12])
def test_random_sigkills_then_resume_is_byte_identical(tmp_path, reference, seed):
    rng = np.random.default_rng(seed)
    path = tmp_path / "killed.h5"
    done, mode, kills = 0, "create", 0
    while kills < 4 and done < LINES - 4:
        kill_after = int(rng.integers(1, max(2, (LINES - done) // 2)))
        acked = _run_and_kill(path, mode, kill_after, float(rng.uniform(0.0, 2e-3)))
        done = _check_plain_open(path, done + acked)
        mode, kills = "resume", kills + 1
    assert kills >= 3
    proc = _start(path, "resume")
    out, _ = proc.communicate(timeout=60)
    assert proc.returncode == 0 and out.strip().endswith("finished"), out
    assert _check_plain_open(path, LINES) == LINES
    assert _datasets(path) == reference
    with h5py.File(path, "r") as f:
        assert bool(f.attrs["complete"])


# A real full disk: the writer's file-size limit (RLIMIT_FSIZE) is set to the file's present size, so the
# next write that would grow the file fails inside HDF5 exactly as on a full disk.
FULL_DISK = r"""
import os, resource, signal, sys, numpy as np
from assistant.storage import SessionFile, SessionWriteError
signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # get EFBIG from write() instead of being killed
path = sys.argv[1]
s = SessionFile.create(path, controller_url="sim://", software_version="test")
w = s.create_series("s", heights_m=[1e-8, 2e-8], biases_v=None, lines=12, pixels=64, scan_size_m=1e-6,
                    line_rate_hz=1.0, order="o", repeat_first=False, settings_json="{}")
line = lambda i: dict(topography_m=np.full(64, float(i)), phase_deg=np.full((2, 64), float(i)),
                      amplitude_v=np.ones((2, 64)))
for i in range(5):
    w.write_line(i, **line(i))
size = os.path.getsize(path)
resource.setrlimit(resource.RLIMIT_FSIZE, (size, size))
outcome = []
try:
    s.write_calibration({"k_n_per_m": 1.0}, {"psd_v2_per_hz": np.zeros(200_000)})
except SessionWriteError as exc:
    outcome.append(isinstance(exc, OSError) and "failed" in str(exc))
try:
    w.write_line(5, **line(5))
except SessionWriteError as exc:
    outcome.append("earlier write" in str(exc))
s.close()
print(outcome)
"""


def test_full_disk_refuses_further_writes_and_keeps_every_line(tmp_path):
    path = tmp_path / "full.h5"
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    done = subprocess.run([sys.executable, "-c", FULL_DISK, str(path)], capture_output=True, text=True, env=env,
                          timeout=60)
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.strip() == "[True, True]"
    with h5py.File(path, "r") as f:
        g = f["series/s"]
        assert g.attrs["completed_lines"] == 5
        np.testing.assert_array_equal(g["phase_deg"][0, :5, 0], [0, 1, 2, 3, 4])
    from assistant.storage import SessionFile, resume_writer

    with SessionFile.open(path, "a") as s:  # space is back: the resume carries on
        w = resume_writer(s, "s")
        for i in range(5, 12):
            w.write_line(i, topography_m=np.full(64, float(i)), phase_deg=np.full((2, 64), float(i)),
                         amplitude_v=np.ones((2, 64)))
        assert s.read_series("s").finished
        np.testing.assert_array_equal(s.read_series("s").phase_deg[1, :, 3], np.arange(12.0))


def test_file_held_by_a_writer_process_gives_a_clear_busy_error(tmp_path):
    from assistant.storage import SessionBusyError, SessionFile

    path = tmp_path / "busy.h5"
    with SessionFile.create(path, controller_url="sim://", software_version="test"):
        code = ("from assistant.storage import SessionFile, SessionBusyError\n"
                f"try:\n    SessionFile.open({str(path)!r})\nexcept SessionBusyError as e:\n    print('busy:', e)\n")
        env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=60)
        assert done.stdout.startswith("busy:") and "open for writing by another process" in done.stdout, done.stderr
    assert issubclass(SessionBusyError, ValueError)


# A whole session's writes (calibrations with long spectra, series creation, lines, analysis), killed at random
# times: whatever stage the kill hits, the file opens plainly and everything in it can be read.
LIFECYCLE = r"""
import sys, numpy as np
from assistant.storage import SessionFile
s = SessionFile.create(sys.argv[1], controller_url="sim://", software_version="test")
print("go", flush=True)
for c in range(3):
    s.write_calibration({"k_n_per_m": 1.0 + c}, {"spectrum_psd_v2_per_hz": np.ones(131073),
                                                 "spectrum_frequency_hz": np.arange(131073.0)})
w = s.create_series("s", heights_m=np.arange(1, 8) * 1e-8, biases_v=None, lines=128, pixels=256,
                    scan_size_m=1e-6, line_rate_hz=1.0, order="o", repeat_first=True, settings_json="{}")
for i in range(128):
    w.write_line(i, topography_m=np.zeros(256), phase_deg=np.zeros((7, 256)), amplitude_v=np.zeros((7, 256)),
                 repeat_phase_deg=np.zeros(256))
s.write_analysis("s", {"a_deg": 1.0}, {"b_deg": np.ones(10)})
s.mark_complete()
"""


def test_kill_at_any_stage_of_a_session_leaves_a_readable_file(tmp_path):
    from assistant.storage import SessionFile

    rng = np.random.default_rng(21)
    env = dict(os.environ, PYTHONPATH=REPO + os.pathsep + os.environ.get("PYTHONPATH", ""))
    for trial in range(5):
        path = tmp_path / f"life{trial}.h5"
        proc = subprocess.Popen([sys.executable, "-c", LIFECYCLE, str(path)], stdout=subprocess.PIPE, text=True,
                                env=env)
        assert proc.stdout is not None and proc.stdout.readline().strip() == "go"
        time.sleep(float(rng.uniform(0.0, 0.25)))  # a real process racing a real signal
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        proc.stdout.close()
        with SessionFile.open(path) as s:  # also checks format and version attributes survived
            for record in s.read_calibrations():
                assert all(values.shape == (131073,) for values in record.arrays.values())
            for name in s.series_names():
                data = s.read_series(name)
                assert np.all(data.phase_deg == 0.0)  # every counted line is there, exactly as written
