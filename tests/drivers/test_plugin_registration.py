"""A third-party driver registers through the entry-point group and is opened by its URL scheme."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from drivers import registry
from drivers.base import Status
from drivers.errors import BadURL, LimitExceeded, UnknownScheme

PLUGIN_DIR = Path(__file__).parent / "example_plugin"


def _install(tmp_path, monkeypatch, name: str, entry_points: str):
    """Install the example plug-in the way pip would: a dist-info folder with entry points on sys.path."""
    dist = tmp_path / f"{name.replace('-', '_')}-0.1.dist-info"
    dist.mkdir()
    (dist / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {name}\nVersion: 0.1\n")
    (dist / "entry_points.txt").write_text(f"[{registry.ENTRY_POINT_GROUP}]\n{entry_points}")
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.syspath_prepend(str(PLUGIN_DIR))
    registry.available.cache_clear()


@pytest.fixture
def installed_plugin(tmp_path, monkeypatch):
    _install(tmp_path, monkeypatch, "example-bench-driver", "example = example_driver:BenchController\n")
    yield tmp_path
    registry.available.cache_clear()


@pytest.fixture
def hijacking_plugin(tmp_path, monkeypatch):
    """A plug-in that claims the built-in scheme ``sim`` for its own class, besides a scheme of its own."""
    _install(tmp_path, monkeypatch, "greedy-bench-driver",
             "sim = example_driver:BenchController\ngreedy = example_driver:BenchController\n")
    yield tmp_path
    registry.available.cache_clear()


def test_entry_point_driver_opens_by_scheme(installed_plugin):
    table = registry.available()
    assert table["example"].origin == "example-bench-driver"
    ctl = registry.open_controller("example://bench?f0=60000&q=100")
    assert ctl.info.model == "bench lever"
    ctl.set_drive(60000.0, 0.1)
    # on resonance the phase of a damped oscillator is 90 deg behind the drive -> reported 0 deg
    assert abs(ctl.read(["phase_deg"])["phase_deg"]) < 1e-9
    with pytest.raises(LimitExceeded, match="Z extension"):
        ctl.move_z(1.0)
    ctl.make_safe()
    assert isinstance(ctl.status(), Status) and ctl.status().safe


def test_builtin_schemes_cannot_be_replaced(hijacking_plugin):
    from importlib.metadata import entry_points

    # the plug-in is installed and does claim sim (so this test would see a replacement)
    claims = {(ep.name, ep.value, ep.dist.name) for ep in entry_points(group=registry.ENTRY_POINT_GROUP)}
    assert ("sim", "example_driver:BenchController", "greedy-bench-driver") in claims
    table = registry.available()
    assert table["greedy"].origin == "greedy-bench-driver"  # its own scheme is added
    assert (table["sim"].origin, table["sim"].target) == ("built-in", registry.BUILTIN["sim"])  # sim is refused
    with registry.open_controller("sim://") as ctl:
        assert type(ctl).__name__ == "SimulatedController"


def test_unknown_scheme_and_bad_url():
    with pytest.raises(UnknownScheme, match="nosuch"):
        registry.open_controller("nosuch://x")
    with pytest.raises(BadURL):
        registry.open_controller("no-scheme-here")


def test_mfma_drivers_lists_the_plugin(installed_plugin):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(installed_plugin), str(PLUGIN_DIR)]))
    out = subprocess.run([sys.executable, "-m", "assistant", "drivers", "--json"], capture_output=True, text=True,
                         env=env, check=True)
    schemes = {row["scheme"]: row for row in json.loads(out.stdout)["drivers"]}
    assert schemes["example"]["state"] == "ok"
    assert "sim" in schemes


def test_redact_hides_secret_key_paths():
    url = "zmq+tcp://10.0.0.5:5555?server=/keys/srv.key&client=/home/u/me.key_secret"
    red = registry.redact(url)
    assert "me.key_secret" not in red and "server=/keys/srv.key" in red
