"""The stored form of a decomposition: every field back exactly, arrays with their dtype, nested parts too."""

from __future__ import annotations

import dataclasses

import numpy as np

from assistant.analysis.lift_series import SeriesAnalysis, analyse_series
from tests.analysis.lift_series.synthetic_series import build_series


def assert_same_result(a, b):
    """Field by field: arrays equal with the same dtype, nested dataclasses and dicts alike, None as None; a numpy
    scalar may come back as the Python number of the same value."""
    if isinstance(a, np.generic):
        a = a.item()
    if isinstance(b, np.generic):
        b = b.item()
    assert type(a) is type(b)
    if dataclasses.is_dataclass(a):
        for f in dataclasses.fields(a):
            assert_same_result(getattr(a, f.name), getattr(b, f.name))
    elif isinstance(a, dict):
        assert a.keys() == b.keys()
        for key in a:
            assert_same_result(a[key], b[key])
    elif isinstance(a, np.ndarray):
        assert a.dtype == b.dtype and a.shape == b.shape
        np.testing.assert_array_equal(a, b)
    else:
        assert a == b or (a != a and b != b), (a, b)  # NaN equals NaN here


def _analysis(**extra):
    s = build_series(rows=32, cols=32, pixel_m=20e-9, heights_m=(20e-9, 30e-9, 50e-9, 80e-9), noise_deg=0.05,
                     repeat=True, flip_disk=(12, 16, 5), seed=3, **extra)
    return analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m,
                          repeat_phase_deg=s.repeat_phase_deg, bias_v=s.bias_v, **s.analysis_kwargs)


def test_a_result_comes_back_from_its_record_field_by_field():
    a = _analysis()
    assert a.tip_change is not None and a.tip_change.irreversible  # the nested parts are all there
    scalars, arrays = a.to_record()
    assert all(isinstance(v, np.ndarray) for v in arrays.values())
    assert not any(isinstance(v, (np.ndarray, list, tuple, dict)) for v in scalars.values())
    assert_same_result(SeriesAnalysis.from_record(scalars, arrays), a)
    assert SeriesAnalysis.from_record(scalars, arrays).to_dict() == a.to_dict()


def test_missing_parts_come_back_as_none():
    a = dataclasses.replace(_analysis(), tip_change=None, cpd_v=None)
    b = SeriesAnalysis.from_record(*a.to_record())
    assert b.tip_change is None and b.cpd_v is None
    assert_same_result(b, a)
