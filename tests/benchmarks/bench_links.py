"""Links: one 256-pixel scan line with 7 second passes through each link, server in its own process.

Network (ZeroMQ on loopback): target < 5 ms per line (link cost; the served controller is a toy whose line
costs microseconds). Serial (pseudo-terminal): the pty moves bytes far faster than any UART, so the line
rate a real line allows is also given from the bytes per line at 10 bit times per byte.
"""

from __future__ import annotations

import os
import signal
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "drivers"))
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from link_fakes import connect, spawn_server  # noqa: E402

from drivers.base import LineSpec, SecondPass  # noqa: E402
from drivers.wire.commands import command, line_args  # noqa: E402
from drivers.wire.scpi import encode_answer, encode_params, format_command  # noqa: E402

SPEC = LineSpec(0.0, 0.0, 5e-6, 256, 1.0, tuple(SecondPass(h * 1e-9) for h in (10, 20, 30, 50, 75, 100, 150)))
BAUDS = (115_200, 921_600)


def _time_lines(client, n: int) -> list[float]:
    client.scan_line(SPEC)  # warm up
    times = []
    for _ in range(n):
        t0 = time.perf_counter()
        client.scan_line(SPEC)
        times.append(time.perf_counter() - t0)
    return times


def _serial_bytes_per_line() -> int:
    cmd = command("SCAN:LINE?")
    args = line_args(SPEC)
    request = len(b"*CLS;" + format_command(cmd.spelling, encode_params(tuple(p.kind for p in cmd.params), args))
                  + b";SYST:ERR?\n")
    import numpy as np

    px, n = SPEC.pixels, len(SPEC.passes)
    fields = (np.zeros(px), np.zeros(px), np.zeros(n * px), np.zeros(n * px), np.zeros(n * px))
    reply = len(encode_answer(cmd.reply, fields)) + len(b';0,"No error"\n')
    return request + reply


def _engage(ctl) -> None:
    """Drive at resonance and step the coarse motor until the feedback holds the setpoint."""
    ctl.set_drive(75e3, 0.2)  # the default scenario's resonance
    free = ctl.read(["amplitude_v"])["amplitude_v"]
    for _ in range(50):
        ctl.set_feedback(True, setpoint_v=0.7 * free)
        if ctl.status().engaged:
            return
        ctl.withdraw()
        ctl.step_coarse(int(0.8 * ctl.limits.z_range_m / ctl.limits.coarse_step_m))
    raise RuntimeError("the simulated stage did not engage")


def _simulated() -> dict:
    """The same line from the simulated stage (fast pace), in process and through ``mfma serve`` over ZeroMQ."""
    import json
    import subprocess

    from drivers.registry import open_controller

    with open_controller("sim://") as sim:
        _engage(sim)
        direct = _time_lines(sim, 20)
    proc = subprocess.Popen([sys.executable, "-m", "assistant", "serve", "--transport", "zmq"],
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    try:
        endpoint = json.loads(proc.stdout.readline())["endpoint"]
        with connect({"endpoint": endpoint}, timeout_s=10.0) as c:
            _engage(c)
            linked = _time_lines(c, 20)
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(10)
    return {"sim_in_process_line_median_ms": 1e3 * statistics.median(direct),
            "sim_over_zmq_line_median_ms": 1e3 * statistics.median(linked)}


def run() -> dict:
    out: dict[str, object] = {"pixels": SPEC.pixels, "second_passes": len(SPEC.passes)}
    for transport, n in (("zmq", 200), ("serial", 100)):
        proc, announcement = spawn_server(transport, watchdog_s=None)
        try:
            with connect(announcement, timeout_s=5.0) as c:
                times = _time_lines(c, n)
        finally:
            os.kill(proc.pid, signal.SIGTERM)
            proc.wait(5)
        out[f"{transport}_line_median_ms"] = 1e3 * statistics.median(times)
        out[f"{transport}_line_p95_ms"] = 1e3 * sorted(times)[int(0.95 * len(times)) - 1]
    out.update(_simulated())
    out["zmq_target_ms"] = 5.0
    out["zmq_meets_target"] = out["zmq_line_median_ms"] < 5.0
    nbytes = _serial_bytes_per_line()
    out["serial_bytes_per_line"] = nbytes
    for baud in BAUDS:
        wire_s = 10.0 * nbytes / baud
        out[f"serial_{baud}_baud_line_s"] = wire_s
        out[f"serial_{baud}_baud_lines_per_s"] = 1.0 / max(wire_s, out["serial_line_median_ms"] / 1e3)
    return out


if __name__ == "__main__":
    import json

    print(json.dumps(run(), indent=2))
