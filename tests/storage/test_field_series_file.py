"""The field series in the session file: layout, units, line-by-line writing, reading completed steps, resuming,
and a writer that dies without closing the file."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from assistant.storage.session_file import FinishedSeriesError, SessionFile, SessionFileError

FIELDS = (3e5, 0.0, -3e5, 0.0, 3e5)


def _create(sf: SessionFile, repeat: bool = True):
    return sf.create_field_series("loop", fields_a_per_m=FIELDS, lines=4, pixels=6, scan_size_m=2e-6,
                                  line_rate_hz=1.0, lift_height_m=50e-9, repeat_first=repeat, order="per step",
                                  settings_json=json.dumps({"a": 1}))


def _line(step: int, line: int) -> dict:
    base = 100.0 * step + line
    return {"topography_m": np.full(6, base * 1e-9), "phase_deg": np.full(6, base),
            "amplitude_v": np.full(6, 0.5), "repeat_phase_deg": np.full(6, base + 0.5)}


def test_layout_units_and_partial_reading(tmp_path):
    path = tmp_path / "s.h5"
    with SessionFile.create(path, controller_url="sim://", software_version="t") as sf:
        w = _create(sf)
        for step in range(2):
            w.write_field(step, FIELDS[step] + 10.0)
            for line in range(4):
                w.write_line(step, line, **_line(step, line))
        w.write_field(2, FIELDS[2])
        w.write_line(2, 0, **_line(2, 0))
        assert w.next_step_line == (2, 1)
        with pytest.raises(SessionFileError, match="not the next line"):
            w.write_line(2, 2, **_line(2, 2))
        with pytest.raises(SessionFileError, match="shape"):
            w.write_line(2, 1, **{**_line(2, 1), "phase_deg": np.zeros(5)})
        data = sf.read_field_series("loop")
        assert sf.field_series_names() == ["loop"]
    assert data.completed_lines == 9 and data.completed_steps == 2 and not data.finished
    assert data.phase_deg.shape == (2, 4, 6) and data.phase_deg[1, 3, 0] == 103.0
    assert data.repeat_phase_deg[0, 2, 0] == 2.5 and data.pixel_m == (0.5e-6, 2e-6 / 6)
    np.testing.assert_array_equal(data.field_a_per_m, FIELDS)
    assert data.measured_field_a_per_m[1] == 10.0 and np.isnan(data.measured_field_a_per_m[3])
    with h5py.File(path, "r") as f:
        g = f["field_series/loop"]
        assert g.attrs["NX_class"] == "NXdata" and g.attrs["signal"] == "phase_deg"
        assert list(g.attrs["axes"]) == ["applied_field_a_per_m", "y_m", "x_m"]
        assert g["applied_field_a_per_m"].attrs["units"] == "A/m" and g["phase_deg"].attrs["units"] == "deg"
        assert g["measured_field_a_per_m"].attrs["units"] == "A/m" and g["topography_m"].attrs["units"] == "m"
        assert f.attrs["default"] == "field_series" and np.isnan(g["phase_deg"][2, 1, 0])


def test_resume_and_finish(tmp_path):
    path = tmp_path / "s.h5"
    with SessionFile.create(path, controller_url="sim://", software_version="t") as sf:
        w = _create(sf, repeat=False)
        with pytest.raises(SessionFileError, match="repeat pass"):
            w.write_line(0, 0, **_line(0, 0))
        w.write_line(0, 0, **{k: v for k, v in _line(0, 0).items() if k != "repeat_phase_deg"})
        with pytest.raises(SessionFileError, match="already exists"):
            _create(sf)
    with SessionFile.open(path, "a") as sf:
        w = sf.open_field_series_for_resume("loop")
        assert w.next_step_line == (0, 1)
        for index in range(1, 20):
            step, line = divmod(index, 4)
            w.write_line(step, line, **{k: v for k, v in _line(step, line).items() if k != "repeat_phase_deg"})
        assert sf.read_field_series("loop").finished
        with pytest.raises(FinishedSeriesError):
            sf.open_field_series_for_resume("loop")


WRITER = """
import json, os, sys
import numpy as np
sys.path[:0] = {paths!r}
from assistant.storage.session_file import SessionFile
sf = SessionFile.create({path!r}, controller_url="sim://", software_version="t")
w = sf.create_field_series("loop", fields_a_per_m=(3e5, 0.0, -3e5), lines=4, pixels=6, scan_size_m=2e-6,
                           line_rate_hz=1.0, lift_height_m=5e-8, repeat_first=False, order="x", settings_json="{{}}")
for index in range(7):
    step, line = divmod(index, 4)
    w.write_line(step, line, topography_m=np.zeros(6), phase_deg=np.full(6, float(index)), amplitude_v=np.ones(6))
os._exit(0)  # dies like a killed process: nothing closed, no HDF5 shutdown
"""


def test_a_writer_that_dies_leaves_every_written_line(tmp_path):
    path = tmp_path / "s.h5"
    root = str(Path(__file__).parents[2])
    subprocess.run([sys.executable, "-c", WRITER.format(paths=[root], path=str(path))], check=True, timeout=60)
    with SessionFile.open(path, "r") as sf:
        data = sf.read_field_series("loop")
    assert data.completed_lines == 7 and data.completed_steps == 1
    assert data.phase_deg[0, :, 0].tolist() == [0.0, 1.0, 2.0, 3.0]
    with h5py.File(path, "r") as f:
        assert f["field_series/loop/phase_deg"][1, 2, 0] == 6.0
