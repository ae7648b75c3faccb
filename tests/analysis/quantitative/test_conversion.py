"""Phase / frequency shift to force gradient, measurement plane, oscillation weight: against published relations."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate

from assistant.analysis.quantitative import (amplitude_weight, force_gradient_from_frequency_shift,
                                             force_gradient_from_phase, measurement_plane_m)


def test_phase_inverts_the_exact_arctan_relation():
    # Driven oscillator at its free resonance: phase = -arctan(Q F'/k) (textbook; check values computed for
    # k = 2.8 N/m, Q = 200: F' = 1e-4 N/m -> 0.409249 deg, F' = 5e-3 N/m -> 19.6538 deg).
    g = force_gradient_from_phase(np.array([-0.409249, -19.6538]), spring_constant_n_per_m=2.8, quality_factor=200)
    assert g == pytest.approx([1e-4, 5e-3], rel=2e-5)
    # attractive gradient (F' > 0) reads as a negative phase
    assert force_gradient_from_phase(-1.0, spring_constant_n_per_m=2.8, quality_factor=200) > 0


def test_phase_conversion_agrees_with_the_lift_series_family():
    # one relation, kept in two families (the quantitative family does not import the lift-series one)
    from assistant.analysis.lift_series import gradient_from_phase_deg

    phase = np.linspace(-60.0, 60.0, 13)
    assert force_gradient_from_phase(phase, spring_constant_n_per_m=2.8, quality_factor=200) == pytest.approx(
        gradient_from_phase_deg(phase, spring_constant_n_per_m=2.8, quality_factor=200), rel=1e-12)
    with pytest.raises(ValueError, match="90"):
        force_gradient_from_phase(95.0, spring_constant_n_per_m=2.8, quality_factor=200)


def test_frequency_shift_inverts_the_exact_square_root():
    # f = f0 sqrt(1 - F'/k) (Albrecht, Gruetter, Horne & Rugar 1991, J. Appl. Phys. 69, 668; from memory);
    # k = 2.8 N/m, f0 = 75 kHz, F' = 1e-4 N/m -> df = -1.339298 Hz (exact form).
    assert force_gradient_from_frequency_shift(-1.339298, spring_constant_n_per_m=2.8, resonance_hz=75e3) == \
        pytest.approx(1e-4, rel=2e-6)


def test_bad_inputs_name_the_quantity():
    with pytest.raises(ValueError, match="quality_factor"):
        force_gradient_from_phase(1.0, spring_constant_n_per_m=2.8, quality_factor=0)
    with pytest.raises(ValueError, match="90"):
        force_gradient_from_phase(95.0, spring_constant_n_per_m=2.8, quality_factor=200)
    with pytest.raises(ValueError, match="plane"):
        measurement_plane_m(5e-9, amplitude_m=20e-9, gap_offset_m=0.0)


def test_measurement_plane_is_the_closest_approach():
    assert measurement_plane_m(20e-9) == 20e-9                      # gap offset = amplitude by default
    assert measurement_plane_m(20e-9, amplitude_m=20e-9, gap_offset_m=14e-9) == pytest.approx(14e-9)


@pytest.mark.parametrize("ka", [0.0, 0.3, 1.0, 4.0])
def test_amplitude_weight_is_the_giessibl_average_of_an_exponential(ka):
    # <exp(-k(d_min + A + q))> with the weight 2 sqrt(A^2 - q^2) / (pi A^2) (Giessibl 2001, Appl. Phys. Lett.
    # 78, 123; from memory), relative to exp(-k d_min): integrated numerically with scipy.
    a, k = 10e-9, ka / 10e-9
    if ka == 0.0:
        assert amplitude_weight(np.array([0.0]), a)[0] == 1.0
        return
    val, _ = integrate.quad(lambda q: math.exp(-k * (a + q)) * 2 * math.sqrt(a * a - q * q) / (math.pi * a * a),
                            -a, a)
    assert amplitude_weight(np.array([k]), a)[0] == pytest.approx(val, rel=1e-9)
