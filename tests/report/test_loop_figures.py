"""The field-series figures against the synthetic stacks' known switching fields (tests/analysis/synthetic_loop.py)."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parents[1] / "analysis"))
from synthetic_loop import loop_fields, make_loop_stack, match  # noqa: E402

from assistant.analysis.field_series import analyse_loop  # noqa: E402
from assistant.report.loop_figures import loop_figure  # noqa: E402


@pytest.fixture(scope="module")
def analysed():
    st = make_loop_stack(seed=8, rows=80, cols=80, fields=loop_fields(450e3, 50e3), drift_step_px=0.2)
    return st, analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m)


def test_histogram_counts_each_element_in_the_interval_it_switched_in(analysed):
    # An element found reversed first at step k switched past the field of step k - 1, at or before that of step
    # k: the bars are those intervals, so the true switching fields (-h on the descending branch, +h on the
    # ascending one) fall in the bars that count them.
    st, a = analysed
    truth = st.switching_a_per_m[match(a.elements.centroids_px, st.centres_px)] / 1e3
    hist = loop_figure(a).axes[1]
    bars = [(p.get_x(), p.get_width(), p.get_height()) for p in hist.patches if p.get_height() > 0]
    edges = np.unique(st.field_a_per_m / 1e3)
    expected, _ = np.histogram(np.r_[-truth, truth], bins=edges)
    drawn = np.zeros(edges.size - 1)
    for x, w, height in bars:
        k = int(np.argmin(np.abs(edges[:-1] - x)))
        assert edges[k] == pytest.approx(x) and edges[k + 1] == pytest.approx(x + w)
        drawn[k] += height
    np.testing.assert_array_equal(drawn, expected)


def test_interval_bounds_are_the_step_before_and_the_first_step_found_reversed(analysed):
    st, a = analysed
    truth = st.switching_a_per_m[match(a.elements.centroids_px, st.centres_px)]
    for which, sign in (("down", -1), ("up", 1)):
        before, at = a.switching_interval_a_per_m(which)
        assert np.all(sign * before < truth) and np.all(truth <= sign * at)
        assert np.all(np.abs(at - before) == 50e3)
    d = a.to_dict()
    assert d["switching_fields_step_before_ka_per_m"][0] == [a.switching_interval_a_per_m(w)[0][0] / 1e3
                                                             for w in ("down", "up")]


def test_field_path_names_the_first_field_the_turning_points_and_the_last():
    from assistant.procedures.field_series import parse_fields_ka_per_m
    from assistant.report.names import field_path

    ka = lambda text: [h * 1e3 for h in parse_fields_ka_per_m(text)]  # noqa: E731
    assert field_path(ka("-450:450:50")) == "-450 kA/m … 450 kA/m … -450 kA/m (37 steps)"
    assert field_path(ka("450:-450:50")) == "450 kA/m … -450 kA/m … 450 kA/m (37 steps)"
    # a virgin branch from zero, the major loop, then a recoil curve from -300 kA/m
    path = ka("0:450:50")[:9] + ka("450:-450:50") + ka("450:-300:50")[1:20]
    assert field_path(path) == "0 A/m … 450 kA/m … -450 kA/m … 450 kA/m … -300 kA/m … -100 kA/m (65 steps)"
