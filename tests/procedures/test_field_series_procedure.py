"""The field-series procedure on the simulated stage: settings, the run, faults of the magnet and of the link
(the stage ends with the field at zero, withdrawn, drive off, bias 0 V), and resuming after an interruption."""

from __future__ import annotations

import sys
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

from assistant.procedures.approach import ApproachSettings, approach
from assistant.procedures.events import Cancelled, CancelToken, Notice, Progress
from assistant.procedures.field_series import (FieldSeriesSettings, FieldSeriesSettingsError, MagnetFault,
                                               parse_fields_ka_per_m, run_field_series, turning_points)
from assistant.procedures.guard import SafetyLimits
from assistant.storage import SessionFile, resume_field_writer
from drivers.errors import ControllerFault, LinkTimeout
from drivers.registry import open_controller

DOT_LOOP = resources.files("simulated_stage").joinpath("scenarios/dot-loop.toml").read_text()
SMALL = FieldSeriesSettings(fields_a_per_m=tuple(f * 1e3 for f in parse_fields_ka_per_m("450:-450:300")),
                            lift_height_m=50e-9, lines=8, pixels=16, scan_size_m=1.0e-6)


def small_scenario(tmp_path: Path, extra: str = "") -> Path:
    """The dot-loop scenario on a 2 µm film (cheap to recompute after every field step), plus ``extra``."""
    path = tmp_path / "dots.toml"
    path.write_text(DOT_LOOP.replace("extent_um = 6.0", "extent_um = 2.0") + extra)
    return path


def engaged(url: str = "sim://", **options):
    ctl = open_controller(url, **options)
    ctl.set_drive(85e3, 0.2)
    free = ctl.read(["amplitude_v"])["amplitude_v"]
    approach(ctl, ApproachSettings(85e3, 0.2, 0.7 * free, free))
    return ctl


def writer(sf: SessionFile, s: FieldSeriesSettings):
    return sf.create_field_series(s.name, fields_a_per_m=s.fields_a_per_m, lines=s.lines, pixels=s.pixels,
                                  scan_size_m=s.scan_size_m, line_rate_hz=s.line_rate_hz,
                                  lift_height_m=s.lift_height_m, repeat_first=s.repeat_first, order=s.order,
                                  settings_json=s.to_json())


def assert_safe(stage) -> None:
    status = stage.status()
    assert not status.engaged and not status.feedback_on and status.z_m == 0.0
    assert not status.drive_on and status.bias_v == 0.0
    assert stage.magnet.field_a_per_m == 0.0


def test_field_lists_and_ranges():
    assert parse_fields_ka_per_m("400:-400:200") == (400, 200, 0, -200, -400, -200, 0, 200, 400)
    assert parse_fields_ka_per_m("-100:100:75") == (-100, -25, 50, 100, 50, -25, -100)
    assert parse_fields_ka_per_m("300, 0,-300") == (300, 0, -300)
    for bad in ("1:2", "a:b:c", "0:100:0", "1,x"):
        with pytest.raises(FieldSeriesSettingsError):
            parse_fields_ka_per_m(bad)
    assert turning_points([400, 0, -400, 0, 400, 0], 5) == [400, -400, 400]
    assert turning_points([400, 0, -400, 0], 3) == [400, -400]
    # an extreme held for two steps is still a turning point
    assert turning_points([400, 200, 0, -200, -400, -400, -200, 0], 7) == [400, -400, -200]
    assert turning_points([400, 400, 0, -400, -400], 5) == [400, -400]


@pytest.mark.parametrize("change,match", [
    ({"fields_a_per_m": (1e5, 0.0)}, "at least 3 field steps"),
    ({"fields_a_per_m": (1e5, 1e5, 1e5)}, "no loop"),
    ({"fields_a_per_m": (3e6, 0.0, -3e6)}, "software limit"),
    ({"field_axis": "x"}, "out-of-plane"),
    ({"lines": 4}, "too small"),
])
def test_bad_settings_are_refused_before_anything_moves(change, match):
    import dataclasses

    with pytest.raises(FieldSeriesSettingsError, match=match):
        dataclasses.replace(SMALL, **change).validate(SafetyLimits())


def test_series_runs_and_ends_with_the_field_at_zero(tmp_path):
    events = []
    with engaged(scenario=str(small_scenario(tmp_path)), seed=1) as ctl:
        with SessionFile.create(tmp_path / "s.h5", controller_url="sim://", software_version="t") as sf:
            res = run_field_series(ctl, SMALL, writer(sf, SMALL), sink=events.append)
            data = sf.read_field_series(SMALL.name)
        assert ctl.stage.magnet.field_a_per_m == 0.0 and ctl.status().engaged  # a normal end keeps the tip down
        with pytest.raises(FieldSeriesSettingsError, match="magnet's limit"):
            run_field_series(ctl, FieldSeriesSettings(fields_a_per_m=(7e5, 0.0, -7e5)), None)
    assert data.finished and data.completed_steps == len(SMALL.fields_a_per_m) == res.completed_steps
    assert np.all(np.isfinite(data.phase_deg)) and np.all(np.isfinite(data.repeat_phase_deg))
    np.testing.assert_allclose(data.measured_field_a_per_m, SMALL.fields_a_per_m, atol=500.0)
    lines = [e for e in events if isinstance(e, Progress)]
    assert len(lines) == SMALL.lines * len(SMALL.fields_a_per_m) and lines[-1].data["step_complete"]


def test_magnet_fault_leaves_the_stage_safe_with_the_field_at_zero(tmp_path):
    faults = ('\n[faults]\nseed = 3\n[[faults.events]]\nkind = "error_code"\ncode = 341\nafter = 3\n'
              'methods = ["set_field"]\nmessage = "magnet power supply tripped"\n')
    with engaged(scenario=str(small_scenario(tmp_path, faults))) as ctl:
        with SessionFile.create(tmp_path / "s.h5", controller_url="sim://", software_version="t") as sf:
            notices = []
            with pytest.raises(ControllerFault, match="tripped"):
                run_field_series(ctl, SMALL, writer(sf, SMALL), sink=notices.append)
            # the 4th field set trips: step 4 (450, 150, -150, then -450 kA/m)
            assert sf.read_field_series(SMALL.name).completed_lines == 3 * SMALL.lines
        assert_safe(ctl.stage)
        assert any(isinstance(n, Notice) and "field 0" in n.text for n in notices)


def test_magnet_that_reads_wrong_is_a_fault(tmp_path):
    with engaged(scenario=str(small_scenario(tmp_path))) as ctl:
        ctl.read_field = lambda: 12345.0  # a Hall probe reading nonsense
        with SessionFile.create(tmp_path / "s.h5", controller_url="sim://", software_version="t") as sf:
            with pytest.raises(MagnetFault, match="reads 12.35 kA/m"):
                run_field_series(ctl, SMALL, writer(sf, SMALL))
        assert_safe(ctl.stage)


def test_link_fault_leaves_the_served_stage_safe(tmp_path):
    sys.path.insert(0, str(Path(__file__).parents[1] / "drivers"))
    from link_fakes import ThreadServer, connect
    from drivers.fault_plan import Fault, FaultPlan

    sim = engaged(scenario=str(small_scenario(tmp_path)))
    # the reply to the 12th request is lost: a scan line, which is never sent twice
    plan = FaultPlan((Fault("timeout", after=11),), seed=0)
    with ThreadServer(sim, transport="zmq", watchdog_s=None, faults=plan, poll_s=0.005) as server:
        client = connect(server.announcement, timeout_s=0.5, retries=0)
        try:
            with SessionFile.create(tmp_path / "s.h5", controller_url="zmq", software_version="t") as sf:
                with pytest.raises(LinkTimeout):
                    run_field_series(client, SMALL, writer(sf, SMALL))
        finally:
            client.close()
    assert_safe(sim.stage)
    sim.close()


def _interrupted(tmp_path, settings: FieldSeriesSettings, lines_done: int):
    """A field series on the small scenario cancelled after ``lines_done`` lines: (scenario, session path, the
    stored series at the stop)."""
    scenario = str(small_scenario(tmp_path))
    path = tmp_path / "s.h5"
    cancel = CancelToken()

    def stop_mid_step(event):
        if isinstance(event, Progress) and event.done == lines_done:
            cancel.set()

    with engaged(scenario=scenario, seed=5) as ctl:
        with SessionFile.create(path, controller_url="sim://", software_version="t") as sf:
            with pytest.raises(Cancelled):
                run_field_series(ctl, settings, writer(sf, settings), sink=stop_mid_step, cancel=cancel)
            before = sf.read_field_series(settings.name)
        assert_safe(ctl.stage)
    return scenario, path, before


def test_interrupted_series_resumes_where_it_stopped(tmp_path):
    scenario, path, before = _interrupted(tmp_path, SMALL, 4 * SMALL.lines + 3)
    assert before.completed_lines == 4 * SMALL.lines + 3 and before.completed_steps == 4
    notices = []
    with engaged(scenario=scenario, seed=5) as ctl:  # a new stage: its dots start unsaturated
        with SessionFile.open(path, "a") as sf:
            w = resume_field_writer(sf, SMALL.name)
            run_field_series(ctl, SMALL, w, sink=notices.append)
            after = sf.read_field_series(SMALL.name)
    assert after.finished
    assert after.phase_deg[:4].tobytes() == before.phase_deg.tobytes()
    text = " ".join(n.text for n in notices if isinstance(n, Notice))
    assert "resuming at field step 5 line 4" in text and "450, -450 kA/m" in text


def test_a_resume_within_the_first_step_has_nothing_to_retrace(tmp_path):
    # the notice used to read "retracing the fields  A/m first": an empty list (the first step sets its own field)
    import h5py

    scenario, path, _ = _interrupted(tmp_path, SMALL, 3)
    with h5py.File(path, "r") as f:
        kept = f[f"field_series/{SMALL.name}/phase_deg"][0, :3].tobytes()
    notices = []
    with engaged(scenario=scenario, seed=5) as ctl:
        with SessionFile.open(path, "a") as sf:
            run_field_series(ctl, SMALL, resume_field_writer(sf, SMALL.name), sink=notices.append)
            after = sf.read_field_series(SMALL.name)
    assert after.finished and after.phase_deg[0, :3].tobytes() == kept
    texts = [n.text for n in notices if isinstance(n, Notice) and n.text.startswith("resuming")]
    assert texts == ["resuming at field step 1 line 4"], texts


def test_resume_retraces_an_extreme_held_for_two_steps(tmp_path):
    # return-point memory: before the interrupted step the magnet must visit -450 kA/m again, the extreme the
    # series held for two steps, or the elements it reversed there are left as they were at the restart
    fields = tuple(f * 1e3 for f in (450, 150, -150, -450, -450, -150, 150, 450))
    settings = FieldSeriesSettings(fields_a_per_m=fields, lift_height_m=50e-9, lines=8, pixels=16,
                                   scan_size_m=1.0e-6)
    scenario, path, _ = _interrupted(tmp_path, settings, 6 * settings.lines + 3)
    set_fields = []
    with engaged(scenario=scenario, seed=5) as ctl:
        set_field = ctl.set_field
        ctl.set_field = lambda h: (set_fields.append(h), set_field(h))[1]
        with SessionFile.open(path, "a") as sf:
            run_field_series(ctl, settings, resume_field_writer(sf, settings.name))
    assert set_fields[:4] == [450e3, -450e3, -150e3, 150e3]  # the history, then the interrupted step itself
