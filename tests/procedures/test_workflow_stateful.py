"""A stateful test of the workflow on the simulated stage: the steps in random order, cancels, and stage faults
injected at random moments. Whatever happens, a step that does not finish leaves the stage safe (tip withdrawn,
drive off, bias 0 V), Z and the bias never leave their limits, and the session file opens afterwards with every
series it holds readable.

A step may fail only with an error of the assistant or of the controller layer (a step out of order, a cancel,
a safety limit, an injected fault): anything else escaping a step is a defect.
"""

from __future__ import annotations

import dataclasses
import shutil
import tempfile
from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, rule, run_state_machine_as_test

from assistant.errors import AssistantError
from assistant.procedures.events import CancelToken
from assistant.procedures.workflow import Workflow
from assistant.storage import SessionFile
from drivers.errors import ControllerError
from drivers.fault_plan import Fault
from drivers.simulated import SimulatedController
from simulated_stage.faults import FaultyStage
from simulated_stage.scenario import build_microscope
from tests.procedures.small_stage import QUICK_CALIBRATION, QUICK_SERIES, small_scenario

SCENARIO = small_scenario()
_SHARED: dict = {}  # one sample for every example: its field maps are the expensive part


class ArmedSchedule:
    """Fault schedule for the stage proxy, armed by the test: a fault fires on the stage call that follows
    ``after`` further calls."""

    def __init__(self) -> None:
        self.rng = np.random.default_rng(0)
        self.armed: list[list] = []

    def arm(self, fault: Fault, after: int) -> None:
        self.armed.append([after, fault])

    def next_call(self, method: str | None = None) -> list[Fault]:
        for entry in self.armed:
            entry[0] -= 1
        firing = [f for n, f in self.armed if n < 0]
        self.armed = [e for e in self.armed if e[0] >= 0]
        return firing


FAULTS = st.sampled_from([Fault("error_code", after=0, code=333), Fault("laser_loss", after=0),
                          Fault("z_jump", after=0, z_jump_m=30e-9), Fault("nan_reading", after=0, nan_fraction=0.2)])


class WorkflowMachine(RuleBasedStateMachine):
    def __init__(self) -> None:
        super().__init__()
        if "sample" not in _SHARED:
            _SHARED["sample"] = build_microscope(SCENARIO, seed=0).sample
        self.folder = Path(tempfile.mkdtemp(prefix="mfma-wf-"))
        self.stage = build_microscope(SCENARIO, seed=0, sample=_SHARED["sample"])
        self.schedule = ArmedSchedule()
        self.proxy = FaultyStage(self.stage, self.schedule)
        self.ctl = SimulatedController(self.proxy, scenario=SCENARIO, seed=0)
        self.wf = Workflow(self.ctl, self.folder / "session.h5")
        self.cancel_next = False
        self.failed = False
        self.series_made = 0

    def _step(self, run) -> None:
        token = CancelToken()
        if self.cancel_next:
            token.set()
            self.cancel_next = False
        self.wf.cancel = token
        try:
            run()
            self.failed = False
        except (AssistantError, ControllerError, OSError):
            self.failed = True

    @initialize(engaged=st.booleans())
    def start(self, engaged):
        """Half the examples start from a calibrated, engaged stage, so that short runs reach the series too."""
        if engaged:
            self._step(lambda: (self.wf.calibrate(QUICK_CALIBRATION), self.wf.approach()))

    @rule()
    def calibrate(self):
        self._step(lambda: self.wf.calibrate(QUICK_CALIBRATION))

    @rule()
    def approach(self):
        self._step(self.wf.approach)

    @rule()
    def series(self):
        self.series_made += 1
        name = f"series{self.series_made}"
        self._step(lambda: self.wf.series(dataclasses.replace(QUICK_SERIES, name=name)))

    @rule()
    def analyse(self):
        self._step(self.wf.analyse)

    @rule()
    def withdraw(self):
        self._step(self.wf.withdraw)

    @rule()
    def cancel_the_next_step(self):
        self.cancel_next = True

    @rule(fault=FAULTS, after=st.integers(0, 40))
    def inject_a_stage_fault(self, fault, after):
        self.schedule.arm(fault, after)

    @rule()
    def realign_the_laser(self):
        self.proxy.restore_laser()

    @invariant()
    def a_step_that_did_not_finish_left_the_stage_safe(self):
        if self.failed:
            assert self.ctl.status().safe, self.ctl.status()

    @invariant()
    def z_and_bias_stay_within_their_limits(self):
        lim = self.stage.limits
        assert 0.0 <= self.stage.z.position_m <= lim.z_range_m
        assert abs(self.stage.bias_v) <= lim.bias_max_v

    def teardown(self):
        try:
            self.wf.withdraw()
            assert self.ctl.status().safe
        finally:
            self.wf.close()
        path = self.folder / "session.h5"
        try:
            if path.exists():  # the file is made by the first step that writes
                with h5py.File(path, "r") as f:  # a plain HDF5 reader opens it
                    assert f.attrs["format"] == "mfm-assistant-session"
                with SessionFile.open(path) as s:
                    for name in s.series_names():
                        data = s.read_series(name)
                        assert data.completed_lines <= data.lines
                        assert np.all(np.isfinite(data.heights_m))
                    for name in s.analysis_names():
                        s.read_analysis(name)
        finally:
            shutil.rmtree(self.folder, ignore_errors=True)


_COMMON = dict(deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])

TestWorkflow = WorkflowMachine.TestCase
TestWorkflow.settings = settings(max_examples=10, stateful_step_count=8, derandomize=True, **_COMMON)


@pytest.mark.slow
def test_workflow_long():
    run_state_machine_as_test(WorkflowMachine, settings=settings(max_examples=60, stateful_step_count=14, **_COMMON))
