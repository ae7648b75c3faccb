"""The workflow: steps in order (or a clear error), what it stores beside a series, and the resume of an
interrupted session from what the file kept."""

from __future__ import annotations

import json

import pytest

from assistant.analysis.lift_series import SeriesInputError
from assistant.procedures.workflow import CALIBRATION_KEYS, ResumePlan, Workflow, WorkflowError
from assistant.storage import FinishedSeriesError, SessionFile, SessionFileError
from drivers.link_faults import DiskGate
from drivers.fault_plan import FaultPlan
from tests.procedures.small_stage import QUICK_CALIBRATION, QUICK_SERIES, open_small


def test_steps_out_of_order_are_refused_before_anything_moves(tmp_path):
    with open_small() as ctl:
        wf = Workflow(ctl, tmp_path / "o.h5")
        try:
            with pytest.raises(WorkflowError, match="calibrate first"):
                wf.approach()
            with pytest.raises(WorkflowError, match="approach first"):
                wf.series(QUICK_SERIES)
            with pytest.raises(SeriesInputError, match="no series"):
                wf.analyse()
            assert ctl.status().safe
        finally:
            wf.close()


def test_an_interrupted_series_resumes_from_the_stored_calibration(tmp_path):
    path = tmp_path / "r.h5"
    plan_faults = FaultPlan.from_specs(["disk_full:after=4"])
    with open_small(seed=9) as ctl:
        gate = DiskGate(plan_faults.schedule({"disk_full"}, stream=2))
        wf = Workflow(ctl, path, before_write=lambda line: gate.check())
        try:
            wf.calibrate(QUICK_CALIBRATION)
            wf.approach()
            with pytest.raises(OSError, match="No space left"):
                wf.series(QUICK_SERIES)
            assert ctl.status().safe
            drive, k = wf.drive, wf.spring_constant_n_per_m
        finally:
            wf.close()
    with SessionFile.open(path) as s:
        stored = json.loads(s.read_series("series1").settings_json)
    # the settings as one JSON object: the series' own keys, then the calibration the series was taken with
    assert list(stored)[-len(CALIBRATION_KEYS):] == list(CALIBRATION_KEYS)
    plan = ResumePlan.read(path)
    assert (plan.completed_lines, plan.drive, plan.spring_constant_n_per_m) == (4, drive, k)
    assert plan.series.heights_m == QUICK_SERIES.heights_m and plan.series.name == "series1"
    with open_small(seed=10) as ctl:
        wf = Workflow.resume(ctl, plan)
        try:
            assert wf.calibration is None and wf.drive == drive  # no new calibration
            wf.approach()
            assert wf.series(plan.series, resume=True).completed_lines == QUICK_SERIES.lines
            wf.analyse()
            wf.session.mark_complete()
        finally:
            wf.close()
    with pytest.raises(FinishedSeriesError, match="nothing to resume"):
        ResumePlan.read(path)
    with SessionFile.create(tmp_path / "empty.h5", controller_url="sim://", software_version="0") as s:
        pass
    with pytest.raises(SessionFileError, match="no series to resume"):
        ResumePlan.read(tmp_path / "empty.h5")
