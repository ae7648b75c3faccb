"""Ctrl-C (SIGINT) to ``mfma run --pace realtime`` in the middle of a 9 s scan line: the guard's abort leaves the
stage withdrawn, drive off, bias 0 V at once (not after the line), in-process and over both links, and the run
exits 130 with a resumable session file. Slow (realtime runs in subprocesses); the figures come from
``python tests/benchmarks/run.py abort``."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import pytest

from drivers.registry import open_controller

pytestmark = [pytest.mark.slow, pytest.mark.timeout(180)]

SCENARIO = """
name = "sigint"
[instrument]
start_gap_um = 7.0
[sample]
pattern = "stripes"
period_nm = 400.0
extent_um = 4.0
pixel_nm = 20.0
"""
RUN = ["run", "--pace", "realtime", "--line-rate", "1", "--no-repeat", "--heights", "10,20,30,40,50,60,70,80",
       "--biases", "0", "--lines", "8", "--pixels", "32", "--thermal-seconds", "0.2"]


def _serve(transport: str, scenario: Path, cwd: Path):
    proc = subprocess.Popen([sys.executable, "-m", "assistant", "serve", "--transport", transport, "--pace",
                             "realtime", "--scenario", str(scenario), "--watchdog", "30"], cwd=cwd,
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    info = json.loads(proc.stdout.readline())
    url = ("zmq+tcp://" + info["endpoint"].split("//", 1)[1]) if "endpoint" in info else f"serial://{info['port']}"
    return proc, url


@pytest.mark.parametrize("where", ["in_process", "zmq", "serial"])
def test_sigint_mid_line_stops_at_once_and_exits_130(tmp_path, where):
    scenario = tmp_path / "s.toml"
    scenario.write_text(SCENARIO)
    server = url = None
    if where != "in_process":
        server, url = _serve(where, scenario, tmp_path)
    try:
        args = RUN + (["--scenario", str(scenario)] if url is None else ["--controller", url])
        client = subprocess.Popen([sys.executable, "-m", "assistant", *args], cwd=tmp_path, text=True,
                                  stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        for line in client.stderr:
            if "engaged:" in line:
                break
        time.sleep(2.0)  # well inside the first 9 s line
        t0 = time.monotonic()
        client.send_signal(signal.SIGINT)
        notice = None
        rest = []
        for line in client.stderr:
            rest.append(line)
            if "stopped" in line and "withdrawn" in line and notice is None:
                notice = time.monotonic() - t0
        assert client.wait(60) == 130, "".join(rest)
        assert notice is not None and notice < 1.0, (notice, "".join(rest))  # the line had 7 s left
        if url is not None:
            with open_controller(url) as ctl:
                assert ctl.status().safe
        session = next((tmp_path / "mfma-out").glob("session-*.h5"))
        with h5py.File(session, "r") as f:
            assert int(f["series/series1"].attrs["completed_lines"]) == 0
    finally:
        if server is not None:
            server.send_signal(signal.SIGTERM)
            server.wait(10)
