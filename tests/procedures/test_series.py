"""The lift-height series: its settings, the order of the passes, the line geometry, and a run that writes
every line as it comes and stops cleanly on a cancel."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from assistant.procedures.approach import approach
from assistant.procedures.events import CancelToken, Cancelled
from assistant.procedures.guard import SafetyError, SafetyLimits
from assistant.procedures.series import SeriesSettings, SeriesSettingsError, line_spec, run_series
from tests.procedures.small_stage import QUICK_SERIES, open_small
from tests.procedures.test_approach import _settings


class Lines:
    """A series writer stand-in: keeps what it is given, line by line."""

    def __init__(self, cancel_after: int | None = None, token: CancelToken | None = None) -> None:
        self.rows: list[int] = []
        self.data: list[dict] = []
        self.cancel_after, self.token = cancel_after, token

    def write_line(self, index, **arrays):
        self.rows.append(index)
        self.data.append(arrays)
        if self.cancel_after is not None and len(self.rows) == self.cancel_after:
            self.token.set()


def test_settings_refuse_what_cannot_work():
    limits = SafetyLimits()
    for bad, match in ((dict(heights_m=(20e-9, 10e-9)), "increasing"), (dict(heights_m=(-1e-9,)), "positive"),
                       (dict(biases_v=(0.0, 1.0)), "three biases"), (dict(lines=4), "minimum of 8"),
                       (dict(heights_m=(10e-6,)), "exceeds the allowed")):
        with pytest.raises(SeriesSettingsError, match=match):
            dataclasses.replace(QUICK_SERIES, **bad).validate(limits)
    with pytest.raises(SafetyError, match="software limit"):
        dataclasses.replace(QUICK_SERIES, bias_v=9.0).validate(limits)
    assert SeriesSettings.from_dict(QUICK_SERIES.to_dict()) == QUICK_SERIES


def test_passes_go_height_by_height_every_bias_with_the_repeat_after_the_first_height():
    s = dataclasses.replace(QUICK_SERIES, biases_v=(-1.0, 0.0, 1.0))
    got = [(p.lift_height_m, p.bias_v) for p in s.passes]
    grid = [(h, b) for h in s.heights_m for b in (-1.0, 0.0, 1.0)]
    assert got == grid[:3] + [(s.heights_m[0], -1.0)] + grid[3:]
    assert "the first height × every bias, its repeat, then the other heights" in s.order
    assert s.phase_shape == (3, 3, 8, 16)
    spec = line_spec(s, 3)
    assert spec.y_m == pytest.approx((3 + 0.5) * s.scan_size_m / s.lines) and spec.pixels == 16


def test_a_run_writes_every_line_and_a_cancel_stops_it_safely():
    with open_small(seed=6) as ctl:
        approach(ctl, _settings(ctl))
        writer = Lines()
        result = run_series(ctl, QUICK_SERIES, writer)
        assert result.completed_lines == 8 and writer.rows == list(range(8))
        line = writer.data[0]
        assert line["phase_deg"].shape == (3, 16) and line["repeat_phase_deg"].shape == (16,)
        # the magnetic contrast falls with the lift height (Laplace: every frequency decays)
        contrast = [np.ptp(np.vstack([d["phase_deg"][i] for d in writer.data])) for i in range(3)]
        assert contrast[0] > contrast[1] > contrast[2]
        assert ctl.status().bias_v == 0.0
        token = CancelToken()
        writer = Lines(cancel_after=2, token=token)
        with pytest.raises(Cancelled):
            run_series(ctl, dataclasses.replace(QUICK_SERIES, name="again"), writer, cancel=token, start_line=3)
        assert writer.rows == [3, 4] and ctl.status().safe
