"""The heights-only split of session series recorded on the simulated stage, against the stage's own parts.

A session knows the free amplitude and the setpoint, so the analysis takes the gap offset from the setpoint rule
(amplitude x setpoint ratio), good to FIRST_PASS_GAP_OFFSET_STD_M. The truth comes by a separate path: the
stage's interaction (its own electrostatics and van der Waals force laws, averaged over its true free amplitude,
a separate implementation from the analysis; DEVELOPERS.md decision 2) at the centre gap its feedback holds plus
each lift height, over the scan area, turned into phase as -arctan(Q F'/k) with the stage's true k and Q
(the phase of a driven oscillator on resonance; Albrecht et al. 1991, J. Appl. Phys. 69, 668).

Measured (default scenario, default series at 0 V, seeds 1-7): with the offset taken as exact the parts missed
by up to 4.36 whole uncertainties, the rms at 10 nm 2.88 (short-range) and 1.94 (electrostatic); with the
rule's uncertainty propagated, at most 1.83, rms at 10 nm 1.01 and 1.04.
"""

from __future__ import annotations

import numpy as np
import pytest

from assistant.procedures.calibrate import CalibrationSettings
from assistant.procedures.series import SeriesSettings
from assistant.procedures.workflow import Workflow
from drivers.registry import open_controller

SEEDS = range(1, 8)


def _z_scores(seed, tmp_path):
    with open_controller("sim://", scenario="default", seed=seed) as ctl:
        wf = Workflow(ctl, tmp_path / f"session{seed}.h5")
        try:
            wf.calibrate(CalibrationSettings())
            wf.approach()
            settings = SeriesSettings(biases_v=None, bias_v=0.0)
            wf.series(settings)
            stage = ctl.stage  # read while the drive is on: the analysis makes the stage safe first
            free = float(stage.free_amplitude_m())
            held = stage.feedback.setpoint_gap_m(free, stage.feedback.setpoint_v / stage.volts_per_m)
            a = wf.analyse()
        finally:
            wf.close()
    grid = (np.arange(48) + 0.5) / 48 * settings.scan_size_m
    x, y = np.meshgrid(grid + settings.x0_m, grid + settings.y0_m)
    out = []
    for part, name in (("electrostatic", "electrostatic_gradient_n_per_m"), ("short_range", "vdw_gradient_n_per_m")):
        g = np.array([getattr(stage.sample.interaction(x, y, np.full_like(x, held + h), bias_v=0.0, amplitude_m=free),
                              name).mean() for h in settings.heights_m])
        truth = -np.degrees(np.arctan(stage.q * g / stage.k))
        whole = np.hypot(getattr(a, f"{part}_mean_std_deg"), getattr(a, f"{part}_mean_model_std_deg"))
        out.append((getattr(a, f"{part}_mean_deg") - truth) / whole)
    return np.array(out)  # (part, height)


@pytest.mark.slow
def test_heights_only_parts_are_within_their_uncertainty_on_stage_sessions(tmp_path):
    z = np.array([_z_scores(seed, tmp_path) for seed in SEEDS])  # (seed, part, height)
    assert np.abs(z).max() <= 3.0, np.round(z, 2)
    # at the lowest height, where the offset matters most, the scatter is one uncertainty: not overconfident
    # (before: 2.88) and not padded (0.5)
    rms = np.sqrt(np.mean(z[:, :, 0] ** 2, axis=0))
    assert np.all((rms >= 0.5) & (rms <= 1.5)), rms
