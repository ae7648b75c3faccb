"""Sphere-plane image-charge series and the Hudlet et al. (1998) cone, against independent values."""

from __future__ import annotations

import numpy as np
import pytest

from simulated_stage import electrostatics as es

R = 30e-9
EPS0 = es.EPSILON_0


def test_exact_sphere_series_matches_high_precision_values():
    # Image-charge series of a sphere over a grounded plane (Smythe 1968, Static and Dynamic Electricity),
    # evaluated independently with mpmath at 40 digits: R = 30 nm, z = 20 nm, V - V_cpd = 0.5 V.
    c, c1, c2 = es.sphere_capacitance(np.array([20e-9]), R)
    assert c[0] == pytest.approx(4.8343166e-18, rel=1e-7)
    assert c1[0] == pytest.approx(-4.793651107e-11, rel=1e-8)
    assert c2[0] == pytest.approx(3.314045268e-3, rel=1e-8)
    assert 0.5 * c1[0] * 0.25 == pytest.approx(-5.992063884e-12, rel=1e-8)
    assert 0.5 * c2[0] * 0.25 == pytest.approx(4.142556584e-4, rel=1e-8)
    # more gaps (same source): F at z = 1, 300, 3000 nm
    _, c1, _ = es.sphere_capacitance(np.array([1e-9, 300e-9, 3000e-9]), R)
    np.testing.assert_allclose(0.5 * c1 * 0.25, [-1.972598e-10, -6.3099742e-14, -6.8850437e-16], rtol=1e-6)


def test_series_derivatives_agree_with_finite_differences():
    z = np.array([0.5e-9, 5e-9, 50e-9, 500e-9])
    h = 1e-4 * z
    c_plus, c1_plus, _ = es.sphere_capacitance(z + h, R)
    c_minus, c1_minus, _ = es.sphere_capacitance(z - h, R)
    _, c1, c2 = es.sphere_capacitance(z, R)
    np.testing.assert_allclose((c_plus - c_minus) / (2 * h), c1, rtol=1e-6)
    np.testing.assert_allclose((c1_plus - c1_minus) / (2 * h), c2, rtol=1e-6)


def test_small_gap_tends_to_the_proximity_form():
    # z << R: F -> -pi eps0 R V^2 / z (proximity approximation). Measured deviation 0.28 % at z/R = 1e-3,
    # 2.0 % at 1e-2, 12.6 % at 0.1: it shrinks steadily as the gap closes.
    ratios = []
    for z_over_r in (1e-1, 1e-2, 1e-3):
        z = z_over_r * R
        _, c1, _ = es.sphere_capacitance(np.array([z]), R)
        ratios.append(0.5 * c1[0] / (-np.pi * EPS0 * R / z))
    deviations = np.abs(1 - np.array(ratios))
    assert deviations[2] < 4e-3
    assert deviations[0] > deviations[1] > deviations[2]


def test_large_gap_tends_to_the_point_charge_image_form():
    # z >> R: F -> -pi eps0 R^2 V^2 / (z + R)^2 (charge 4 pi eps0 R V at the sphere centre and its image)
    z = 1e-3 * 1e3 * R * 100  # 3 mm, z/R = 1e5
    _, c1, _ = es.sphere_capacitance(np.array([z]), R)
    assert 0.5 * c1[0] == pytest.approx(-np.pi * EPS0 * R**2 / (z + R) ** 2, rel=1e-4)


def test_hudlet_terms_match_check_values():
    # Hudlet, Saint Jean, Guthmann & Berger 1998, Eur. Phys. J. B 2, 5: R = 30 nm, z = 20 nm, 0.5 V
    f, g = es.hudlet_apex_force(np.array([20e-9]), R, 0.0, 0.5)
    assert f[0] == pytest.approx(-6.258656566e-12, rel=1e-6)
    assert g[0] == pytest.approx(4.381059596e-4, rel=1e-6)
    theta = np.radians(15.0)
    f, g = es.hudlet_apex_force(np.array([20e-9]), R, theta, 0.5)
    assert f[0] == pytest.approx(-5.4915946e-12, rel=1e-6)
    assert g[0] == pytest.approx(4.0460314e-4, rel=1e-6)
    k1, k2 = es.cone_capacitance_derivatives(np.array([20e-9]), R, theta, 10e-6)
    assert 0.5 * k1[0] * 0.25 == pytest.approx(-1.1887442e-11, rel=1e-6)
    assert 0.5 * k2[0] * 0.25 == pytest.approx(1.4260032e-4, rel=1e-6)


def test_tabulated_capacitance_matches_the_series_and_adds_the_cone():
    tc = es.TipCapacitance(radius_m=R, half_angle_rad=np.radians(15.0), cone_height_m=10e-6)
    z = np.geomspace(0.2e-9, 2e-3, 4001)
    c1, c2 = tc.derivatives(z)
    e1, e2 = tc.exact_derivatives(z)
    # measured: 3e-11 relative (the spline runs over log|C'| and log C'' against log z)
    np.testing.assert_allclose(c1, e1, rtol=1e-9)
    np.testing.assert_allclose(c2, e2, rtol=1e-9)
    # at 20 nm and 0.5 V the cone dominates the force, the apex the gradient (Hudlet et al. 1998)
    f = tc.force_per_v2(np.array([20e-9]))[0] * 0.25
    assert f == pytest.approx(-5.992063884e-12 - 1.1887442e-11, rel=1e-6)
    # clamped at contact: no force change below the contact gap
    below = tc.derivatives(np.array([0.0, -1e-9]))
    assert np.all(below[1] == 0.0) and np.all(np.isfinite(below[0]))
