"""Kill a ``mfma run`` at a chosen moment and resume it: the pieces shared by the kill tests.

A trial starts the run in its own process (on ``sim://`` or through ``mfma serve`` over ZeroMQ or a serial
pseudo-terminal), stops it with SIGKILL or SIGINT (Ctrl-C) after a delay measured from the process start or from
the first scan line, checks the session file it left, and resumes it in this process (``main(["run",
"--resume", ...])``). The properties: the file always opens with a plain ``h5py.File(path, "r")``, every line
counted in ``completed_lines`` is finite and stays byte-identical through the resume, the resumed run finishes
(exit 0, the session marked complete, every line written) and records where it went on, and nothing is left in
the run's temporary directory.
"""

from __future__ import annotations

import json
import os
import select
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from assistant.cli import main

def quick_scenario(folder: Path) -> Path:
    """The default scenario with the coarse motor starting 12 µm from the surface (the approach takes one cycle
    instead of about 6 s at realtime pace) and a 6 µm sample at 20 nm pixels (cheap stray-field maps)."""
    from importlib import resources

    text = resources.files("simulated_stage").joinpath("scenarios/default.toml").read_text()
    for old, new in (("[instrument]\n", "[instrument]\nstart_gap_um = 12.0\n"),
                     ("extent_um = 12.0", "extent_um = 6.0"), ("pixel_nm = 10.0", "pixel_nm = 20.0")):
        assert old in text, old
        text = text.replace(old, new, 1)
    path = folder / "quick.toml"
    path.write_text(text)
    return path


LINES = 10
RUN = ["--lines", str(LINES), "--pixels", "16", "--heights", "10,20,40", "--biases", "0", "--thermal-seconds", "0.3",
       "--line-rate", "20"]
DATASETS = ("topography_m", "phase_deg", "amplitude_v", "repeat_phase_deg")


@dataclass
class Outcome:
    """What one trial saw (for the report of the slow test)."""

    kind: str
    pace: str
    link: str
    delay_s: float
    after_first_line: bool
    exit_code: int | None = None
    lines_before: int | None = None  # None: the run was stopped before its session file existed
    complete_before: bool = False
    resumed: bool = False
    notes: list[str] = field(default_factory=list)


def serve(link: str, cwd: Path, *, pace: str, seed: int = 7) -> tuple[subprocess.Popen, str]:
    """``mfma serve`` of the quick scenario on loopback; returns the process and the controller URL (the client
    gives up on a silent server after a 3 s timeout)."""
    proc = subprocess.Popen([sys.executable, "-m", "assistant", "serve", "--transport", link, "--seed", str(seed),
                             "--watchdog", "30", "--pace", pace, "--scenario", str(quick_scenario(cwd))], cwd=cwd,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    ready, _, _ = select.select([proc.stdout], [], [], 60)
    assert ready, "server did not announce itself"
    info = json.loads(proc.stdout.readline())
    if link == "serial":
        return proc, f"serial://{info['port']}"
    return proc, "zmq+tcp://" + info["endpoint"].split("//", 1)[1] + "?timeout=3&retries=1"


def stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def start_run(cwd: Path, *, pace: str, url: str = "sim://", extra: tuple[str, ...] = (),
              temporary: Path | None = None) -> subprocess.Popen:
    argv = [sys.executable, "-m", "assistant", "run", *RUN, "--controller", url, *extra]
    if url.startswith("sim"):
        argv += ["--pace", pace, "--seed", "3", "--scenario", str(quick_scenario(cwd))]
    env = None if temporary is None else {**os.environ, "TMPDIR": str(temporary)}
    return subprocess.Popen(argv, cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def left_in(temporary: Path, wait_s: float = 10.0) -> list[Path]:
    """What the run left in its temporary directory once its fork server had time to end (it outlives a run
    killed outright by a moment)."""
    deadline = time.monotonic() + wait_s
    while any(temporary.iterdir()) and time.monotonic() < deadline:
        time.sleep(0.1)
    return list(temporary.rglob("*"))


def wait_for_engaged(proc: subprocess.Popen, timeout_s: float = 180) -> bool:
    """Read the run's stderr until the approach reports the tip engaged (the series starts next; notices are
    written at once, progress lines at most once a second); False if the run ended first."""
    t0 = time.monotonic()
    for line in proc.stderr:
        if line.startswith("engaged:"):
            return True
        assert time.monotonic() - t0 < timeout_s, "the approach never ended"
    return False


def session_of(cwd: Path) -> Path | None:
    found = sorted((cwd / "mfma-out").glob("session-*.h5"))
    return found[-1] if found else None


def snapshot(path: Path) -> tuple[int | None, bool, dict[str, bytes]]:
    """Open the file plainly; the completed lines of every dataset as bytes (None lines: no series yet)."""
    with h5py.File(path, "r") as f:  # must open after any kill
        complete = bool(f.attrs["complete"])
        if "series/series1" not in f:
            return None, complete, {}
        s = f["series/series1"]
        done = int(s.attrs["completed_lines"])
        kept = {}
        for name in DATASETS:
            if name in s:
                block = s[name][..., :done, :]
                assert np.all(np.isfinite(block)), f"{name}: a counted line holds NaN"
                kept[name] = block.tobytes()
        return done, complete, kept


def without_pngs(monkeypatch) -> None:
    """Build the resumed run's report without rendering its figures: the resume is under test here, the figures
    are drawn by the full runs of test_run_e2e.py and test_single_height.py, and rendering them is most of a
    resume's time (9.6 of 11 s, profiled)."""
    from matplotlib.figure import Figure

    monkeypatch.setattr(Figure, "savefig", lambda self, *args, **kwargs: None)


def resume(path: Path, url: str, capsys) -> dict:
    code = main(["run", "--resume", str(path), "--controller", url, "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    return json.loads(out)


def check_resumed(path: Path, before: dict[str, bytes], done: int) -> None:
    with h5py.File(path, "r") as f:
        assert bool(f.attrs["complete"])
        s = f["series/series1"]
        assert int(s.attrs["completed_lines"]) == LINES
        for name, old in before.items():
            assert s[name][..., :done, :].tobytes() == old, f"{name}: a completed line changed in the resume"
            assert np.all(np.isfinite(s[name][...]))


def trial(cwd: Path, capsys, *, kind: str, pace: str, link: str, delay_s: float, after_first_line: bool,
          url: str = "sim://") -> Outcome:
    """One kill and resume (see the module docstring); ``url`` is the server's for a link. ``after_first_line``:
    the delay counts from the tip engaging (the series starts next), else from the process start."""
    sig = signal.SIGKILL if kind == "sigkill" else signal.SIGINT
    o = Outcome(kind, pace, link, delay_s, after_first_line)
    temporary = Path(tempfile.mkdtemp(prefix="mfma-"))  # short: the fork server's socket path fits in 108 bytes
    proc = start_run(cwd, pace=pace, url=url, temporary=temporary)
    signalled_at = None
    try:
        if after_first_line and not wait_for_engaged(proc):
            o.notes.append("finished before the tip engaged")
        time.sleep(delay_s)
        if proc.poll() is None:
            proc.send_signal(sig)
            signalled_at = time.monotonic()
        else:
            o.notes.append("ended before the signal")
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:  # a failed wait must not leave the run behind
            proc.kill()
            proc.wait()
    o.exit_code = proc.returncode
    try:
        assert not left_in(temporary), f"the run left {left_in(temporary, 0)} in its temporary directory"
    finally:
        shutil.rmtree(temporary, ignore_errors=True)
    path = session_of(cwd)
    if path is None:  # stopped before the session file was created (a Ctrl-C may even hit the interpreter's
        assert o.exit_code != 0  # own start-up): nothing reached the disk, nothing to resume
        o.notes.append("stopped before the session file existed")
        return o
    if kind == "sigint":
        # 130, or death by SIGINT (-2, also 130 in the shell) when CPython saw the interrupt inside code it ran
        # through its own string-evaluation path; 0 only when the run was already finishing
        assert o.exit_code in (0, 130, -signal.SIGINT), f"Ctrl-C ended the run with exit {o.exit_code}: {err[-400:]}"
        if o.exit_code == 0 and signalled_at is not None:
            assert time.monotonic() - signalled_at < 3.0, "a Ctrl-C was ignored: the run went on for seconds"
        if o.exit_code == 130:
            assert "withdrawn" in err and "Traceback" not in err, err[-400:]
    done, complete, before = snapshot(path)
    o.lines_before, o.complete_before = done, complete
    if complete:
        assert main(["run", "--resume", str(path), "--controller", url]) == 2
        assert "already complete" in capsys.readouterr().err
        return o
    resume(path, url, capsys)
    o.resumed = True
    check_resumed(path, before, done or 0)
    with h5py.File(path, "r") as f:  # where the resumed lines begin is kept (none when no line came before)
        seams = list(f["series/series1"].attrs.get("resumed_at_lines", []))
    assert seams == ([done] if done and done < LINES else []), seams
    return o
