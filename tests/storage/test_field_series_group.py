"""The field series in the session file: layout, units, line-by-line writing, reading completed steps, resuming,
a writer that dies without closing the file, and the loop analysis kept whole beside it."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from assistant.storage import (FinishedSeriesError, SessionFile, SessionFileError, resume_field_writer,
                               resume_point)

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
        point = resume_point(sf)
        assert (point.kind, point.series_name, point.completed_lines, point.lines) == ("field_series", "loop", 1, 20)
        assert point.settings == {"a": 1}
        w = resume_field_writer(sf, "loop")
        assert w.next_step_line == (0, 1)
        for index in range(1, 20):
            step, line = divmod(index, 4)
            w.write_line(step, line, **{k: v for k, v in _line(step, line).items() if k != "repeat_phase_deg"})
        assert sf.read_field_series("loop").finished
        with pytest.raises(FinishedSeriesError):
            resume_field_writer(sf, "loop")
        with pytest.raises(FinishedSeriesError, match="field series 'loop' .* is already complete"):
            resume_point(sf)


WRITER = """
import json, os, sys
import numpy as np
sys.path[:0] = {paths!r}
from assistant.storage import SessionFile
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


def _lift_series(sf: SessionFile, lines_written: int) -> None:
    w = sf.create_series("series1", heights_m=[2e-8, 4e-8, 8e-8], biases_v=None, lines=2, pixels=6,
                         scan_size_m=2e-6, line_rate_hz=1.0, order="x", repeat_first=False,
                         settings_json=json.dumps({"b": 2}))
    for i in range(lines_written):
        w.write_line(i, topography_m=np.zeros(6), phase_deg=np.zeros((3, 6)), amplitude_v=np.ones((3, 6)))


@pytest.mark.parametrize("lift_lines,kind", [(2, "field_series"), (1, "series")])
def test_an_unfinished_lift_series_is_resumed_before_a_field_series(tmp_path, lift_lines, kind):
    with SessionFile.create(tmp_path / "s.h5", controller_url="sim://", software_version="t") as sf:
        _lift_series(sf, lift_lines)
        _create(sf).write_line(0, 0, **_line(0, 0))
        point = resume_point(sf)
    assert point.kind == kind and point.completed_lines == 1


def test_the_loop_analysis_is_kept_whole(tmp_path):
    # what the report draws: the stored result read back equals the one computed, field by field, dtypes kept
    import dataclasses

    sys.path.insert(0, str(Path(__file__).parents[1] / "analysis"))
    from synthetic_loop import loop_fields, make_loop_stack

    from assistant.analysis.field_series import LoopAnalysis, analyse_loop

    st = make_loop_stack(seed=5, rows=64, cols=64, fields=loop_fields(450e3, 50e3))
    result = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m,
                          repeat_phase_deg=st.repeat_phase_deg, pixel_m=st.pixel_m)
    assert result.tip_reversal_steps and result.notes and result.down is not None  # the nested parts are there
    with SessionFile.create(tmp_path / "s.h5", controller_url="sim://", software_version="t") as sf:
        sf.write_analysis("fields1", {"analysis": "field series"}, result=result.to_record())
    with SessionFile.open(tmp_path / "s.h5") as sf:
        record = sf.read_analysis_result("fields1")
    back = LoopAnalysis.from_record(record.scalars, record.arrays)

    def same(a, b, where: str) -> None:
        if dataclasses.is_dataclass(a):
            for f in dataclasses.fields(a):
                same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
        elif isinstance(a, np.ndarray):
            assert a.dtype == b.dtype and np.array_equal(a, b, equal_nan=True), where
        elif isinstance(a, tuple):
            assert len(a) == len(b), where
            for i, (x, y) in enumerate(zip(a, b)):
                same(x, y, f"{where}[{i}]")
        elif isinstance(a, float) and np.isnan(a):
            assert np.isnan(b), where
        else:
            assert type(a) is type(b) and a == b, where

    same(result, back, "result")
    assert back.to_dict() == result.to_dict()
