"""Cost of the sample physics at the default map size (20 um film at 10 nm: 2000^2 pixels, 2048^2 padded).

Slow (builds several full-size maps); run with ``-m slow``. Wall-clock timing is the point of these tests,
so they use time.perf_counter; the limits are generous multiples of what was measured on two cores.
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from simulated_stage.sample import SampleSpec, build_sample
from simulated_stage.tip import TipSpec

HEIGHTS = np.array([20e-9, 30e-9, 50e-9, 75e-9, 100e-9, 150e-9, 200e-9])


@pytest.mark.slow
def test_interaction_cost_per_line_and_height_with_a_warm_cache():
    sample = build_sample(SampleSpec(), TipSpec())
    rng = np.random.default_rng(5)
    x = np.linspace(-2.5e-6, 2.5e-6, 256)
    lines = 64
    ys = -2.5e-6 + np.arange(lines) * 5e-6 / lines

    def one_line(y: float) -> None:
        for h in HEIGHTS:
            # second pass: the lift height plus a tracking error of ~1 nm rms
            sample.interaction(x, y, h + rng.normal(0.0, 1e-9, x.size), bias_v=0.5, amplitude_m=10e-9)

    start = time.perf_counter()
    for y in ys[:8]:
        one_line(y)
    warm_up_s = time.perf_counter() - start

    def cost_per_call(run, calls: int) -> float:
        # CPU time of this process, best of four batches: the machine is shared with other test runs
        best = np.inf
        for batch in np.array_split(ys, 4):
            start = time.process_time()
            for y in batch:
                run(y)
            best = min(best, (time.process_time() - start) / (len(batch) * calls))
        return best

    per_call_s = cost_per_call(one_line, len(HEIGHTS))
    # all heights of a line in one call, as the instrument sends them
    xs = np.broadcast_to(x, (len(HEIGHTS), x.size))

    def joint(y: float) -> None:
        sample.interaction(xs, np.full(xs.shape, y), HEIGHTS[:, None] + rng.normal(0.0, 1e-9, xs.shape),
                           bias_v=0.5, amplitude_m=10e-9)

    per_height_joint_s = cost_per_call(joint, len(HEIGHTS))
    # measured (CPU time, two cores shared with other runs, load ~4): 0.53-0.68 ms per (line, height) with
    # separate calls, 0.30 ms when the seven heights come in one call (the instrument's way); wall-clock
    # 0.35 ms and 0.24 ms on a quiet machine. Warm-up 3.4 s quiet, 13 s under load (spectrum, 7-8 nodes).
    assert per_call_s < 1e-3
    assert per_height_joint_s < 1e-3
    assert warm_up_s < 20.0
    assert len(sample.magnetic.nodes) <= 2 * len(HEIGHTS)


@pytest.mark.slow
def test_node_build_cost_on_the_padded_grid():
    sample = build_sample(SampleSpec(), TipSpec())
    sample.interaction(np.zeros(4), 0.0, 50e-9, bias_v=0.0, amplitude_m=10e-9)  # spectrum and weights
    assert sample.magnetic._stray_field().shape == (2048, 2048)
    start = time.perf_counter()
    sample.interaction(np.zeros(4), 0.0, 90e-9, bias_v=0.0, amplitude_m=10e-9)
    node_s = time.perf_counter() - start
    assert node_s < 1.5  # measured ~0.35 s: five inverse FFTs of 2048^2 plus float32 crops


@pytest.mark.slow
def test_switching_update_cost_per_line():
    # defaults switch the film in tapping (tip field ~5.9e5 A/m at 30 nm > 2e5 A/m coercive field)
    sample = build_sample(SampleSpec(), TipSpec())
    x = np.linspace(-2.5e-6, 2.5e-6, 256)
    for h in HEIGHTS:
        sample.interaction(x, 0.0, h, bias_v=0.0, amplitude_m=10e-9)
    start = time.perf_counter()
    switched = [sample.expose(x, np.full_like(x, y), np.zeros_like(x)) for y in (0.0, 20e-9, 40e-9)]
    per_line_s = (time.perf_counter() - start) / 3
    assert min(switched) > 0
    assert per_line_s < 3.0  # measured ~0.4 s with 7 cached heights (local FFT update of 35 maps)
