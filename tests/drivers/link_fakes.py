"""A small stand-in controller for the link tests: a toy stage object (optionally wrapped in the fault proxy)
behind a Controller subclass that, on purpose, does *not* check limits itself, so the server's own checks are
what the tests see. Also helpers to run a server in a thread or a subprocess.
"""

from __future__ import annotations

import json
import subprocess
import sys
import threading
from collections import Counter
from pathlib import Path

import numpy as np

from drivers.base import (
    Capability, Controller, ControllerInfo, ForceCurve, LineData, LineSpec, Limits, PassData, Status, SweepData,
)
from drivers.errors import ControllerFault, LaserLost
from simulated_stage.errors import LASER_LOST, StageFault

ROOT = Path(__file__).resolve().parents[2]


class ToyStage:
    """The 'instrument': plain state and signals, no checks."""

    def __init__(self, seed: int = 0) -> None:
        self.rng = np.random.default_rng(seed)
        self.z_m = 0.0
        self.x_m = self.y_m = 0.0
        self.coarse_m = 0.0
        self.bias_v = 0.0
        self.drive = (0.0, 0.0, False)
        self.feedback = False

    def read(self, channels):
        values = {"deflection_v": 0.01, "sum_v": 3.0, "amplitude_v": 0.3, "phase_deg": -1.5, "z_m": self.z_m,
                  "frequency_shift_hz": 0.0}
        return {c: values[c] for c in channels}

    def set_drive(self, f, a):
        self.drive = (f, a, True)

    def drive_off(self):
        self.drive = (self.drive[0], self.drive[1], False)

    def move_z(self, z):
        self.z_m = z

    def move_xy(self, x, y):
        self.x_m, self.y_m = x, y

    def step_coarse(self, steps):
        self.coarse_m += 1e-6 * steps

    def withdraw(self):
        self.feedback = False
        self.z_m = 0.0

    def set_feedback(self, on):
        self.feedback = on
        if on:
            self.z_m = max(self.z_m, 2e-6)

    def set_bias(self, v):
        self.bias_v = v

    def scan(self, pixels, passes):
        x = np.linspace(0, 1, pixels)
        return {"topography_m": 1e-9 * np.sin(6 * x) + self.z_m,
                "phase_deg": [-np.cos(6 * x) / (1 + h * 1e8) + 0.01 * b for h, b in passes]}

    def deflection(self, n):
        return self.rng.normal(0, 1e-3, n).astype(np.float32)


class FakeController(Controller):
    """Every method delegates to a ToyStage (or a fault proxy around it) and counts its calls."""

    schemes = ("fake",)

    def __init__(self, stage=None) -> None:
        self.stage = stage if stage is not None else ToyStage()
        self.info = ControllerInfo("Toy Works", "T-1", "0001", "0.1")
        self.capabilities = frozenset(Capability)
        self.limits = Limits()
        self.calls: Counter[str] = Counter()
        self.lock_tc = 1e-3

    @classmethod
    def from_url(cls, url, **options):
        return cls()

    def _do(self, name, *args):
        self.calls[name] += 1
        try:
            return getattr(self.stage, name)(*args)
        except StageFault as exc:
            if exc.code == LASER_LOST:
                raise LaserLost(exc.code, str(exc)) from exc
            raise ControllerFault(exc.code, str(exc)) from exc

    def read(self, channels):
        return self._do("read", list(channels))

    def record_deflection(self, samples, rate_hz, *, chunk=1 << 18):
        self.calls["record_deflection"] += 1
        done = 0
        while done < samples:
            n = min(chunk, samples - done)
            yield self._do("deflection", n)
            done += n

    def set_drive(self, frequency_hz, amplitude_v):
        self._do("set_drive", frequency_hz, amplitude_v)

    def drive_off(self):
        self._do("drive_off")

    def set_lockin_time_constant(self, seconds):
        self.calls["set_lockin_time_constant"] += 1
        self.lock_tc = seconds

    def sweep(self, frequencies_hz, amplitude_v, *, settle_s=None):
        self.calls["sweep"] += 1
        f = np.asarray(frequencies_hz, float)
        amp = amplitude_v / np.hypot(1 - (f / 7e4) ** 2, f / 7e4 / 400)
        return SweepData(f, amp, np.degrees(np.arctan2(f / 7e4 / 400, 1 - (f / 7e4) ** 2)))

    def move_z(self, z_m):
        self._do("move_z", z_m)

    def step_coarse(self, steps):
        self._do("step_coarse", steps)

    def move_xy(self, x_m, y_m):
        self._do("move_xy", x_m, y_m)

    def withdraw(self):
        self._do("withdraw")

    def set_feedback(self, enabled, *, setpoint_v=None, p_gain=None, i_gain=None):
        self._do("set_feedback", enabled)

    def scan_line(self, spec: LineSpec) -> LineData:
        res = self._do("scan", spec.pixels, [(p.lift_height_m, p.bias_v) for p in spec.passes])
        passes = [PassData(p.lift_height_m, p.bias_v, ph, np.full(spec.pixels, 0.3), np.zeros(spec.pixels))
                  for p, ph in zip(spec.passes, res["phase_deg"])]
        return LineData(res["topography_m"], np.zeros(spec.pixels), passes)

    def force_curve(self, z_stop_m, points):
        self.calls["force_curve"] += 1
        z = np.linspace(0, z_stop_m, points)
        return ForceCurve(z, 0.1 * z / max(z_stop_m, 1e-12), z[::-1], 0.1 * z[::-1] / max(z_stop_m, 1e-12))

    def set_bias(self, bias_v):
        self._do("set_bias", bias_v)

    def status(self):
        s = self.stage
        return Status(engaged=s.feedback, z_m=s.z_m, coarse_position_m=s.coarse_m, bias_v=s.bias_v,
                      drive_on=s.drive[2], drive_frequency_hz=s.drive[0], drive_amplitude_v=s.drive[1],
                      feedback_on=s.feedback)

    def close(self):
        pass


class ThreadServer:
    """Run ``drivers.server.serve`` in a daemon thread; ``announcement`` is the first JSON line's content."""

    def __init__(self, controller, **kwargs) -> None:
        from drivers.server import serve

        self.stop = threading.Event()
        self._ready = threading.Event()
        self.announcement: dict = {}
        self.error: BaseException | None = None

        def announce(d):
            self.announcement = d
            self._ready.set()

        def run():
            try:
                serve(controller, announce=announce, stop=self.stop, **kwargs)
            except BaseException as exc:  # surfaced by start()
                self.error = exc
                self._ready.set()

        self.thread = threading.Thread(target=run, daemon=True)

    def start(self, timeout_s: float = 5.0) -> dict:
        self.thread.start()
        if not self._ready.wait(timeout_s):
            raise TimeoutError("server did not announce itself")
        if self.error is not None:
            raise self.error
        return self.announcement

    def close(self) -> None:
        self.stop.set()
        self.thread.join(5.0)

    def __enter__(self):
        self.start()
        return self

    def __exit__(self, *exc):
        self.close()


SERVER_SCRIPT = """
import json, sys
sys.path[:0] = {paths!r}
from link_fakes import FakeController
from drivers.server import serve
def announce(d):
    sys.stdout.write(json.dumps(d) + "\\n"); sys.stdout.flush()
serve(FakeController(), transport={transport!r}, watchdog_s={watchdog_s!r}, announce=announce)
"""


def spawn_server(transport: str, watchdog_s: float | None = 5.0) -> tuple[subprocess.Popen, dict]:
    """A server in its own process (so that it can be killed); returns it and its announcement."""
    code = SERVER_SCRIPT.format(paths=[str(Path(__file__).parent), str(ROOT)], transport=transport,
                                watchdog_s=watchdog_s)
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, cwd=ROOT)
    line = proc.stdout.readline()
    if not line:
        proc.kill()
        raise RuntimeError(f"server failed to start: {proc.stderr.read()[-2000:]}")
    return proc, json.loads(line)


#: Requests a client makes while opening (resync line for serial, then *IDN?, capabilities, limits).
OPEN_REQUESTS = {"serial": 4, "zmq": 3}


def connect(announcement: dict, **kwargs):
    """A client driver for whatever a server announced."""
    from drivers.network_link import NetworkController
    from drivers.serial_link import SerialController

    if "endpoint" in announcement:
        return NetworkController(announcement["endpoint"], **kwargs)
    return SerialController(announcement["port"], **kwargs)
