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


@pytest.fixture
def installed_plugin(tmp_path, monkeypatch):
    """Install the example plug-in the way pip would: a dist-info folder with an entry point on sys.path."""
    dist = tmp_path / "example_bench_driver-0.1.dist-info"
    dist.mkdir()
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: example-bench-driver\nVersion: 0.1\n")
    (dist / "entry_points.txt").write_text(
        "[mfm_assistant.drivers]\nexample = example_driver:BenchController\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.syspath_prepend(str(PLUGIN_DIR))
    registry.available.cache_clear()
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


def test_builtin_schemes_cannot_be_replaced(installed_plugin):
    assert registry.available()["sim"].origin == "built-in"


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
