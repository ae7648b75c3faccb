"""Session file: layout, NeXus attributes, units, line-by-line writing, resume and the error family."""

from __future__ import annotations

import json
from datetime import datetime, timezone

import h5py
import numpy as np
import pytest

from assistant.storage import (
    FORMAT_NAME,
    FinishedSeriesError,
    FormatVersionError,
    NotASessionFileError,
    SessionFile,
    SessionFileError,
    UnwritablePathError,
    redact_controller_url,
    resume_writer,
    unit_for_name,
)

NOW = datetime(2026, 3, 4, 5, 6, 7, tzinfo=timezone.utc)
HEIGHTS_M = [10e-9, 20e-9, 40e-9]
PIXELS = 16
LINES = 6


def _series(session: SessionFile, name: str = "s1", *, biases=None, repeat=True, fshift=False, before_write=None):
    return session.create_series(name, heights_m=HEIGHTS_M, biases_v=biases, lines=LINES, pixels=PIXELS,
                                 scan_size_m=4e-6, line_rate_hz=0.5, order="topography,heights",
                                 repeat_first=repeat, settings_json=json.dumps({"lines": LINES}),
                                 frequency_shift=fshift, before_write=before_write)


def _line(i: int, lead: tuple[int, ...] = (3,)) -> dict[str, np.ndarray]:
    rng = np.random.default_rng([7, i])
    return {"topography_m": rng.normal(0, 1e-9, PIXELS), "phase_deg": rng.normal(0, 0.5, lead + (PIXELS,)),
            "amplitude_v": rng.normal(1, 0.01, lead + (PIXELS,)), "repeat_phase_deg": rng.normal(0, 0.5, PIXELS)}


@pytest.fixture
def session(tmp_path):
    with SessionFile.create(tmp_path / "a.h5", controller_url="zmq+tcp://lab:5555?client=/home/u/me.key_secret",
                            scenario_text="[probe]\nquality_factor = 200\n", software_version="0.1.0",
                            now=NOW) as s:
        yield s


def test_root_attributes_and_complete_flag(session):
    info = session.info()
    assert (info.format, info.format_version, info.software_version) == (FORMAT_NAME, 1, "0.1.0")
    assert info.created_utc == "2026-03-04T05:06:07Z"
    assert info.controller_url == "zmq+tcp://lab:5555?client=REDACTED"
    assert info.scenario_text.startswith("[probe]") and info.complete is False
    session.mark_complete()
    assert session.info().complete is True


def test_lines_round_trip_only_completed_lines_and_nan_fill(session):
    writer = _series(session)
    for i in range(4):
        writer.write_line(i, **_line(i))
    data = session.read_series("s1")
    assert data.completed_lines == 4 and not data.finished
    assert data.phase_deg.shape == (3, 4, PIXELS) and data.topography_m.shape == (4, PIXELS)
    for i in range(4):
        ref = _line(i)
        np.testing.assert_array_equal(data.phase_deg[:, i, :], ref["phase_deg"])
        np.testing.assert_array_equal(data.amplitude_v[:, i, :], ref["amplitude_v"])
        np.testing.assert_array_equal(data.topography_m[i], ref["topography_m"])
        np.testing.assert_array_equal(data.repeat_phase_deg[i], ref["repeat_phase_deg"])
    np.testing.assert_allclose(data.heights_m, HEIGHTS_M)
    assert data.biases_v is None and json.loads(data.settings_json) == {"lines": LINES}
    session.flush()
    with h5py.File(session.path, "r") as f:  # plain h5py, lines never written are NaN
        g = f["series/s1"]
        assert np.isnan(g["phase_deg"][:, 4:, :]).all() and np.isnan(g["topography_m"][4:]).all()
        assert g["phase_deg"].chunks == (3, 1, PIXELS) and g["topography_m"].chunks == (1, PIXELS)
        np.testing.assert_allclose(g.attrs["heights_nm"], [10, 20, 40])
        assert g.attrs["completed_lines"] == 4


def test_bias_grid_shape_and_frequency_shift(session):
    writer = _series(session, biases=[-1.0, 0.0, 1.0], repeat=False, fshift=True)
    line = _line(0, (3, 3))
    del line["repeat_phase_deg"]
    with pytest.raises(SessionFileError, match="frequency_shift_hz was declared"):
        writer.write_line(0, **line)
    writer.write_line(0, **line, frequency_shift_hz=np.zeros((3, 3, PIXELS)))
    data = session.read_series("s1")
    assert data.phase_deg.shape == (3, 3, 1, PIXELS) and data.frequency_shift_hz.shape == (3, 3, 1, PIXELS)
    np.testing.assert_array_equal(data.biases_v, [-1.0, 0.0, 1.0])
    assert data.repeat_phase_deg is None


def test_every_dataset_has_units_and_nexus_default_chain_is_plottable(session):
    session.write_calibration({"k_n_per_m": 2.8, "k_std_n_per_m": 0.08, "q": 210.0, "method": "thermal"},
                              {"frequency_hz": np.linspace(7e4, 8e4, 11), "psd_v2_per_hz": np.ones(11)},
                              plot=("psd_v2_per_hz", "frequency_hz"))
    session.write_resonance({"f0_hz": 75e3}, {"frequency_hz": np.arange(3.0), "amplitude_v": np.ones(3)})
    session.write_approach({"steps": 12}, {"z_m": np.arange(3.0)})
    session.write_analysis("s1", {"recommended_lift_nm": 30.0}, {"drift_px": np.zeros((3, 2))})
    _series(session, biases=[0.0, 2.0])
    session.flush()
    with h5py.File(session.path, "r") as f:
        datasets = []
        f.visititems(lambda name, obj: datasets.append(obj) if isinstance(obj, h5py.Dataset) else None)
        assert len(datasets) >= 12
        for ds in datasets:
            assert "units" in ds.attrs, ds.name
        assert f["probe/0/psd_v2_per_hz"].attrs["units"] == "V^2/Hz"
        assert f["analysis/s1/drift_px"].attrs["units"] == "pixel"
        assert json.loads(f["probe/0"].attrs["scalar_units"])["k_n_per_m"] == "N/m"
        for nxdata in (f[f.attrs["default"]][f[f.attrs["default"]].attrs["default"]], f["probe/0"],
                       f["series/s1/topography"]):
            assert nxdata.attrs["NX_class"] == "NXdata"
            signal = nxdata[nxdata.attrs["signal"]]
            axes = list(nxdata.attrs["axes"])
            assert len(axes) == signal.ndim
            for dim, axis in enumerate(axes):
                assert axis in nxdata and nxdata[axis].shape == (signal.shape[dim],), axis
                assert nxdata[axis].attrs["units"]
        assert f["series/s1"].attrs["NX_class"] == "NXdata" and f["series"].attrs["NX_class"] == "NXentry"


def test_records_read_back_with_units(session):
    session.write_calibration({"k_n_per_m": 2.8, "q": 200.0})
    session.write_calibration({"k_n_per_m": 2.7, "q": 190.0, "invols_nm_per_v": 55.0})
    cals = session.read_calibrations()
    assert [c.path for c in cals] == ["probe/0", "probe/1"]
    assert cals[1].scalars["invols_nm_per_v"] == 55.0 and cals[1].units["invols_nm_per_v"] == "nm/V"
    session.write_analysis("s1", {"a_deg": 1.0}, {})
    session.write_analysis("s1", {"b_deg": 2.0}, {})  # replaces the first
    assert session.read_analysis("s1").scalars == {"b_deg": 2.0}
    assert session.read_resonance() is None and session.analysis_names() == ["s1"]


def test_a_resume_is_recorded_where_the_series_went_on(tmp_path):
    # the lines after a resume come from a new approach (drift, the coarse motor): without a record of where, a
    # stitched image read as one (a 32-line run resumed at line 8 moved the magnetic rms by 25 standard errors)
    from assistant.report.sections import series_section

    path = tmp_path / "r.h5"
    with SessionFile.create(path, controller_url="sim://", software_version="0.1.0") as s:
        _series(s)
    for start, stop in ((0, 2), (2, 3), (3, 5)):
        with SessionFile.open(path, "a") as s:
            w = resume_writer(s, "s1")  # at 0 nothing came before: no seam
            for i in range(start, stop):
                w.write_line(i, **_line(i))
    with SessionFile.open(path) as s:
        data = s.read_series("s1")
        assert data.resumed_at_lines == (2, 3) and data.completed_lines == 5
        text = "\n".join(series_section(data, None))
    assert "resumed at line 3, line 4 of 6 lines per image" in text and "neither measured nor corrected" in text
    with h5py.File(path, "r") as f:
        assert list(f["series/s1"].attrs["resumed_at_lines"]) == [2, 3]


def test_resume_continues_and_refuses_finished_series(tmp_path):
    path = tmp_path / "r.h5"
    with SessionFile.create(path, controller_url="sim://", software_version="0.1.0") as s:
        w = _series(s)
        for i in range(2):
            w.write_line(i, **_line(i))
        s.mark_complete()
    with SessionFile.open(path, "a") as s:
        w = resume_writer(s, "s1")
        assert w.completed_lines == 2 and json.loads(w.settings_json) == {"lines": LINES}
        assert s.info().complete is False  # reopened work is not finished until marked again
        with pytest.raises(SessionFileError, match="line index 3 is not the next line"):
            w.write_line(3, **_line(3))
        for i in range(2, LINES):
            w.write_line(i, **_line(i))
        with pytest.raises(FinishedSeriesError):
            w.write_line(LINES, **_line(LINES))
        with pytest.raises(FinishedSeriesError, match="is finished"):
            resume_writer(s, "s1")
        with pytest.raises(SessionFileError, match="already exists"):
            _series(s)
    with SessionFile.open(path) as s:
        assert s.read_series("s1").finished


def test_fault_hook_oserror_leaves_earlier_lines_readable(tmp_path):
    path = tmp_path / "f.h5"

    def disk_full_at_3(index: int) -> None:
        if index == 3:
            raise OSError(28, "No space left on device (injected)")

    with SessionFile.create(path, controller_url="sim://", software_version="0.1.0", fsync=True) as s:
        w = _series(s, before_write=disk_full_at_3)
        for i in range(3):
            w.write_line(i, **_line(i))
        with pytest.raises(OSError, match="No space left"):
            w.write_line(3, **_line(3))
    with h5py.File(path, "r") as f:
        assert f["series/s1"].attrs["completed_lines"] == 3
        for i in range(3):
            np.testing.assert_array_equal(f["series/s1/phase_deg"][:, i, :], _line(i)["phase_deg"])
        assert np.isnan(f["series/s1/phase_deg"][:, 3:, :]).all()


def test_write_line_checks_shapes(session):
    w = _series(session)
    bad = _line(0)
    bad["phase_deg"] = bad["phase_deg"][:2]
    with pytest.raises(SessionFileError, match=r"phase_deg has shape \(2, 16\), expected \(3, 16\)"):
        w.write_line(0, **bad)
    with pytest.raises(SessionFileError, match="repeat_phase_deg was declared"):
        w.write_line(0, **{k: v for k, v in _line(0).items() if k != "repeat_phase_deg"})
    assert w.completed_lines == 0


def test_error_family(tmp_path):
    plain = tmp_path / "plain.h5"
    with h5py.File(plain, "w") as f:
        f.attrs["format"] = "something-else"
    with pytest.raises(NotASessionFileError, match="not a session file"):
        SessionFile.open(plain)
    text = tmp_path / "notes.txt"
    text.write_text("hello")
    with pytest.raises(NotASessionFileError, match="not an HDF5 session file"):
        SessionFile.open(text)
    with pytest.raises(NotASessionFileError, match="does not exist"):
        SessionFile.open(tmp_path / "missing.h5")
    future = tmp_path / "future.h5"
    with SessionFile.create(future, controller_url="sim://", software_version="9"):
        pass
    with h5py.File(future, "a") as f:
        f.attrs["format_version"] = 99
    with pytest.raises(FormatVersionError, match="version 99"):
        SessionFile.open(future)
    with pytest.raises(UnwritablePathError, match="already exists"):
        SessionFile.create(future, controller_url="sim://", software_version="9")
    with pytest.raises(UnwritablePathError, match="cannot create"):
        SessionFile.create(tmp_path / "no" / "such" / "dir.h5", controller_url="sim://", software_version="9")
    with pytest.raises(SessionFileError, match="mode must be"):
        SessionFile.open(future, "w")  # type: ignore[arg-type]
    for err in (NotASessionFileError, FormatVersionError, UnwritablePathError, FinishedSeriesError):
        assert issubclass(err, SessionFileError) and issubclass(err, ValueError)


def test_series_argument_checks(session):
    with pytest.raises(SessionFileError, match="heights_m"):
        session.create_series("x", heights_m=[], biases_v=None, lines=2, pixels=2, scan_size_m=1e-6,
                              line_rate_hz=1.0, order="o", repeat_first=False, settings_json="{}")
    with pytest.raises(SessionFileError, match="settings_json is not valid JSON"):
        session.create_series("x", heights_m=[1e-8], biases_v=None, lines=2, pixels=2, scan_size_m=1e-6,
                              line_rate_hz=1.0, order="o", repeat_first=False, settings_json="{nope")
    with pytest.raises(SessionFileError, match="name"):
        session.write_analysis("a/b", {}, {})


@pytest.mark.parametrize("url, expected", [
    ("sim://", "sim://"),
    ("sim://?scenario=/data/coupon.toml", "sim://?scenario=/data/coupon.toml"),
    ("serial:///dev/ttyUSB0?baud=115200", "serial:///dev/ttyUSB0?baud=115200"),
    ("zmq+tcp://user:pw@10.0.0.2:5555?server=/k/srv.key&client=/k/me.key_secret&timeout_s=2",
     "zmq+tcp://10.0.0.2:5555?server=REDACTED&client=REDACTED&timeout_s=2"),
    ("zmq+tcp://h:1?other=/home/u/.curve/me.key_secret", "zmq+tcp://h:1?other=REDACTED"),
])
def test_controller_url_redaction(url, expected):
    assert redact_controller_url(url) == expected


@pytest.mark.parametrize("name, unit", [
    ("k_n_per_m", "N/m"), ("k_std_n_per_m", "N/m"), ("f0_hz", "Hz"), ("q", ""), ("q_std", ""),
    ("invols_nm_per_v", "nm/V"), ("temperature_k", "K"), ("density_kg_m3", "kg/m^3"), ("viscosity_pa_s", "Pa s"),
    ("psd_v2_per_hz", "V^2/Hz"), ("lift_height_m", "m"), ("phase_deg", "deg"), ("drift_px", "pixel"), ("k", ""),
])
def test_unit_from_name_suffix(name, unit):
    assert unit_for_name(name) == unit


def test_frequency_shift_added_at_first_line_that_carries_it(session):
    w = _series(session, biases=[], repeat=True)  # an empty bias list means no bias grid
    w.write_line(0, **_line(0), frequency_shift_hz=np.full((3, PIXELS), -1.5))
    with pytest.raises(SessionFileError, match="frequency_shift_hz was declared"):
        w.write_line(1, **_line(1))
    data = session.read_series("s1")
    assert data.biases_v is None and data.frequency_shift_hz.shape == (3, 1, PIXELS)
    np.testing.assert_array_equal(data.frequency_shift_hz, -1.5)
    session.flush()
    with h5py.File(session.path, "r") as f:
        assert f["series/s1/frequency_shift_hz"].attrs["units"] == "Hz"
        assert list(f["series/s1"].attrs["auxiliary_signals"]) == ["amplitude_v", "frequency_shift_hz"]


def test_bad_arguments_leave_no_half_written_group(session):
    with pytest.raises(SessionFileError, match="plot names 'psd_v2_per_hz'"):
        session.write_calibration({"k_n_per_m": 1.0}, {"frequency_hz": np.arange(3.0)},
                                  plot=("psd_v2_per_hz", "frequency_hz"))
    with pytest.raises(SessionFileError, match="reserved"):
        session.write_resonance({"NX_class": "x"})
    with pytest.raises(SessionFileError, match="must be a float, int, str or bool"):
        session.write_approach({"trace": [1, 2]})
    with pytest.raises(SessionFileError, match="biases_v"):
        session.create_series("x", heights_m=[1e-8], biases_v=[np.nan], lines=2, pixels=2, scan_size_m=1e-6,
                              line_rate_hz=1.0, order="o", repeat_first=False, settings_json="{}")
    assert session.read_calibrations() == [] and session.read_resonance() is None
    assert session.read_approach() is None and session.series_names() == []


def test_a_stored_result_reads_back_exactly(tmp_path):
    # what the report draws from: every value and dtype as written, apart from the summary the group lists
    from tests.analysis.lift_series.test_result import _analysis, assert_same_result
    from assistant.analysis.lift_series import SeriesAnalysis

    result = _analysis()
    path = tmp_path / "a.h5"
    with SessionFile.create(path, controller_url="sim://", software_version="0.1.0") as s:
        s.write_analysis("s1", {"recommended_lift_nm": 30.0}, {"magnetic_rms_deg": [1.0, 0.5]},
                         result=result.to_record())
        s.write_analysis("s2", {"recommended_lift_nm": 30.0})
    with SessionFile.open(path) as s:
        summary = s.read_analysis("s1")
        assert set(summary.arrays) == {"magnetic_rms_deg"} and set(summary.scalars) == {"recommended_lift_nm"}
        stored = s.read_analysis_result("s1")
        assert s.read_analysis_result("s2") is None and s.read_analysis_result("s3") is None
    assert_same_result(SeriesAnalysis.from_record(stored.scalars, stored.arrays), result)


def test_a_new_file_appears_only_with_its_root_attributes_and_plan(tmp_path, monkeypatch):
    """The file is written under a hidden name and renamed once its root attributes and the run plan are on disk:
    a stop at any moment leaves no file, or one that says what the run was for (a Ctrl-C that landed between the
    file's creation and the plan's write left a file that could not be resumed, once in 24 kill trials)."""
    import os

    import assistant.storage.session_file as session_file

    path = tmp_path / "session.h5"
    seen = {}
    real_link = os.link

    def spying_link(src, dst):
        with h5py.File(src, "r") as f:  # what the final name will show, at the moment it appears
            seen.update(plan=f.attrs.get("run_plan_json"), format=f.attrs.get("format"))
        real_link(src, dst)

    monkeypatch.setattr(session_file.os, "link", spying_link)
    with SessionFile.create(path, controller_url="sim://", software_version="t", run_plan_json='{"lines": 8}') as s:
        assert s.info().run_plan_json == '{"lines": 8}' and s.path == path
    assert seen == {"plan": '{"lines": 8}', "format": FORMAT_NAME}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["session.h5"]

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(session_file, "_write_root_attributes", interrupted)
    with pytest.raises(KeyboardInterrupt):
        SessionFile.create(tmp_path / "stopped.h5", controller_url="sim://", software_version="t")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["session.h5"]  # nothing left, not even the hidden file
    monkeypatch.undo()
    (tmp_path / ".killed.h5.creating").write_bytes(b"left by a SIGKILL")
    SessionFile.create(tmp_path / "killed.h5", controller_url="sim://", software_version="t").close()
    assert SessionFile.open(tmp_path / "killed.h5").info().format == FORMAT_NAME
    with pytest.raises(SessionFileError, match="run plan is"):
        SessionFile.create(tmp_path / "big.h5", controller_url="sim://", software_version="t",
                           run_plan_json="x" * 70_000)


@pytest.mark.parametrize("hard_links", [True, False])
def test_a_new_file_never_takes_the_name_of_a_file_that_appeared_meanwhile(tmp_path, monkeypatch, hard_links):
    """Two runs started in the same second in one folder pick the same name: the one that finishes creating its
    file second gets a one-line error, and the first run's session is left as it is (also where the file system
    has no hard links and the name is given by a rename)."""
    import os

    import assistant.storage.session_file as session_file

    path = tmp_path / "session.h5"
    real_write = session_file._write_root_attributes

    def other_run_first(attrs, **kwargs):  # the other run's file takes the name while this one is written
        # this run writes under a hidden name of its own process: the other run's hidden file is another one
        assert [p.name for p in tmp_path.iterdir()] == [f".session.h5.{os.getpid()}.creating"]
        path.write_bytes(b"the other run's session")
        real_write(attrs, **kwargs)

    def no_hard_links(src, dst):
        raise PermissionError(1, "Operation not permitted")

    monkeypatch.setattr(session_file, "_write_root_attributes", other_run_first)
    if not hard_links:
        monkeypatch.setattr(session_file.os, "link", no_hard_links)
    with pytest.raises(UnwritablePathError, match="already exists"):
        SessionFile.create(path, controller_url="sim://", software_version="t")
    assert path.read_bytes() == b"the other run's session"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["session.h5"]  # no hidden file left
