"""``Sample.true_hz_a_per_m`` (the stage's field, for tests of field maps) against the closed-form stripe series."""

from __future__ import annotations

import numpy as np
import pytest

from simulated_stage.sample import SampleSpec, build_sample
from simulated_stage.tip import TipSpec


def test_true_field_of_stripes_matches_the_series():
    # Square-wave stripes, Ms = 8e5 A/m, t = 50 nm, period 400 nm, 50 nm above the film: at a domain centre
    # Hz = sum_n odd (2 Ms/(n pi)) (-1)^((n-1)/2) exp(-k_n z)(1 - exp(-k_n t)) = 1.134816e5 A/m, and 9.806939e4 A/m
    # at x = 50 nm (charge formulation, Hug et al. 1998, J. Appl. Phys. 83, 5609, from memory; values computed and
    # cross-checked against magpylib with 401 bars).
    spec = SampleSpec(pattern="stripes", period_nm=400.0, transition_width_nm=0.0,
                      saturation_magnetisation_ka_per_m=800.0, thickness_nm=50.0, extent_um=4.0, pixel_nm=4.0,
                      roughness_nm=0.0)
    sample = build_sample(spec, TipSpec())
    hz = sample.true_hz_a_per_m(np.array([0.0, 50e-9]), np.array([0.0, 0.0]), 50e-9)
    assert hz == pytest.approx([1.134816e5, 9.806939e4], rel=1e-3)
    with pytest.raises(ValueError, match="height_m"):
        sample.true_hz_a_per_m(0.0, 0.0, -1e-9)
