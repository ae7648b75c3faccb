"""A whole ``mfma run`` over the serial and ZeroMQ links gives the series of the in-process run (same scenario and
seed), and a killed server ends the run cleanly with a resumable session file. Loopback only."""

from __future__ import annotations

import json
import os
import select
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from assistant.cli import main

SMALL = ["--lines", "8", "--pixels", "32", "--heights", "10,20,40", "--thermal-seconds", "0.5"]


def mfma(*argv: str, cwd: Path, timeout: float = 240) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "assistant", *argv], cwd=cwd, capture_output=True, text=True,
                          timeout=timeout)


def serve(transport: str, cwd: Path, seed: int = 7, pace: str = "fast") -> tuple[subprocess.Popen, str]:
    proc = subprocess.Popen([sys.executable, "-m", "assistant", "serve", "--transport", transport, "--seed", str(seed),
                             "--watchdog", "30", "--pace", pace], cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    ready, _, _ = select.select([proc.stdout], [], [], 60)
    assert ready, "server did not announce itself"
    info = json.loads(proc.stdout.readline())
    url = f"serial://{info['port']}" if transport == "serial" else "zmq+tcp://" + info["endpoint"].split("//", 1)[1]
    return proc, url


def stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def phase_of(folder: Path) -> np.ndarray:
    with h5py.File(next(folder.glob("session-*.h5")), "r") as f:
        return f["series/series1/phase_deg"][...]


@pytest.fixture(scope="module")
def in_process(tmp_path_factory) -> np.ndarray:
    cwd = tmp_path_factory.mktemp("local")
    out = mfma("run", *SMALL, "--seed", "7", "--out", "local", cwd=cwd)
    assert out.returncode == 0, out.stderr
    return phase_of(cwd / "local")


@pytest.mark.parametrize("transport", ["zmq", "serial"])
def test_same_series_over_the_link(tmp_path, in_process, transport):
    server, url = serve(transport, tmp_path)
    try:
        out = mfma("run", *SMALL, "--controller", url, "--out", "remote", cwd=tmp_path)
        assert out.returncode == 0, out.stderr
    finally:
        stop(server)
    remote = phase_of(tmp_path / "remote")
    assert remote.shape == in_process.shape
    # arrays cross the wire as float32: agreement to float32 resolution of a few-degree signal
    np.testing.assert_allclose(remote, in_process, rtol=0, atol=1e-4)


def test_killed_server_ends_the_run_and_resume_finishes(tmp_path, capsys, monkeypatch):
    # realistic pace on the server's stage, so the series is still running when the server dies:
    # 16 lines x 5 passes at 20 lines/s per pass take 4 s. The client gives up on a silent server after one
    # 3 s timeout (URL options; the longest request, the realtime sweep, takes about 1 s), and the resume runs
    # in this process against a second server, started while the first run goes on.
    from tests.cli.kill_resume import serve as serve_quick, without_pngs

    without_pngs(monkeypatch)

    server, url = serve_quick("zmq", tmp_path, pace="realtime")  # the quick scenario: a one-cycle approach
    server2 = None
    try:
        client = subprocess.Popen([sys.executable, "-m", "assistant", "run", "--lines", "16", "--pixels", "32",
                                   "--heights", "10,20,40", "--biases", "0", "--line-rate", "20", "--thermal-seconds",
                                   "0.5", "--controller", url.split("?")[0] + "?timeout=3&retries=0"],
                                  cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        server2, url2 = serve_quick("zmq", tmp_path, pace="fast")
        for line in client.stderr:
            if line.startswith("series ") and " of " in line:  # the first plain progress line of the series
                break
        time.sleep(0.3)
        killed_at = time.monotonic()
        os.kill(server.pid, signal.SIGKILL)
        server.wait()
        _, err = client.communicate(timeout=60)
        assert client.returncode == 1, err
        assert time.monotonic() - killed_at < 10  # the link's timeout, plus saving
        last = err.strip().splitlines()[-1]
        assert last.startswith("mfma: error:") and "Traceback" not in err
        session = next((tmp_path / "mfma-out").glob("session-*.h5"))
        with h5py.File(session, "r") as f:
            done = int(f["series/series1"].attrs["completed_lines"])
            before = f["series/series1/phase_deg"][..., :done, :].copy()
        assert 0 < done < 16
        assert main(["run", "--resume", str(session), "--controller", url2]) == 0, capsys.readouterr().err
    finally:
        stop(server)
        if server2 is not None:
            stop(server2)
    with h5py.File(session, "r") as f:
        s = f["series/series1"]
        assert int(s.attrs["completed_lines"]) == 16 and bool(f.attrs["complete"])
        assert s["phase_deg"][..., :done, :].tobytes() == before.tobytes()
