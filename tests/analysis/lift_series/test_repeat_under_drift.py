"""The repeat check on the default scenario's hard film, over a line long enough for the stage's drift to matter.

The default scenario's film has a coercive field (800 kA/m) above anything the tip applies, and its scanner drifts
(0.02 nm/s along x, -0.01 nm/s along y; thermal drift of this size is common practice to expect, no source). With
seven heights and four biases a line holds 29 second passes: a repeat at the end of the line came 28 s after the
pass it repeats, and the 0.3 nm the sample moved along y in that time, at track edges the 125 nm rows cannot
resolve, read as a change over 0.4-1.2 % of the image on every seed tried (five of five). The repeat now follows
the passes of the first height, a few seconds after the first pass.
"""

from __future__ import annotations

import numpy as np
import pytest

from assistant.procedures.calibrate import CalibrationSettings
from assistant.procedures.series import SeriesSettings
from assistant.procedures.workflow import Workflow
from drivers.registry import open_controller

HEIGHTS_M = (10e-9, 15e-9, 20e-9, 30e-9, 50e-9, 75e-9, 100e-9)
BIASES_V = (-0.5, 0.0, 0.5, 1.0)


@pytest.mark.parametrize("seed", [1, 3])
def test_a_hard_film_under_drift_is_not_reported_rewritten(tmp_path, seed):
    with open_controller("sim://", scenario="default", seed=seed) as ctl:
        wf = Workflow(ctl, tmp_path / "session.h5")
        try:
            wf.calibrate(CalibrationSettings(temperature_k=298.15, thermal_seconds=0.5))
            wf.approach()
            magnetisation = ctl.stage.sample.magnetic._mz.copy()
            # the default run's series: 4 um, 128 pixels, 32 lines at 1 Hz
            wf.series(SeriesSettings(heights_m=HEIGHTS_M, biases_v=BIASES_V, lines=32, pixels=128,
                                     scan_size_m=4e-6))
            a = wf.analyse()
            # the premise, from the stage's own film: the tip switched nothing
            assert np.array_equal(ctl.stage.sample.magnetic._mz, magnetisation)
        finally:
            wf.close()
    d = a.to_dict()
    assert d["tip_changed_sample"] is False, a.tip_change.sentence
    assert d["interaction_regime"] != "irreversible", d["interaction_evidence"]
