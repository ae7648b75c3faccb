"""Helpers of the field-series states (assistant/analysis/field_series/states.py) against numpy."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from assistant.analysis.field_series.states import column_nanmedian


@pytest.mark.parametrize("rows", (1, 2, 7, 160, 161))
def test_column_nanmedian_is_numpys_nanmedian_to_the_last_bit(rows):
    rng = np.random.default_rng(rows)
    a = rng.normal(size=(rows, 40)) * 10.0 ** rng.integers(-3, 4, size=40)
    a[rng.random(a.shape) < 0.3] = np.nan  # odd and even counts in the columns
    a[:, 0] = np.nan  # a column without any value
    a[: rows // 2 + 1, 1] = np.inf
    a[rows // 2:, 2] = -np.inf
    a[:, 3] = np.round(a[:, 3])  # ties
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # numpy warns of the empty column
        expected = np.nanmedian(a, axis=0)
    np.testing.assert_array_equal(column_nanmedian(a), expected)
