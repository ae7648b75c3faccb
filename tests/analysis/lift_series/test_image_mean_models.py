"""Lift models against published formulas and check values computed from them.

Check values: exact sphere-plane series (Smythe 1968, Static and Dynamic Electricity; evaluated with
mpmath at 40 digits), Hudlet, Saint Jean, Guthmann & Berger 1998, Eur. Phys. J. B 2, 5 (formulas from
memory), Hamaker 1937, Physica 4, 1058 / Israelachvili 2011 (full sphere-plane form, from memory, re-derived),
Giessibl 1997, Phys. Rev. B 56, 16010 and Giessibl 2001, Appl. Phys. Lett. 78, 123 (finite-amplitude
average, from memory; closed form for an exponential force with the Bessel function I1).
"""

import numpy as np
import pytest
from scipy import integrate, special

from assistant.analysis.lift_series import image_mean_models as lm
from assistant.analysis.lift_series import phase

R = 30e-9
Z = 20e-9
V = 0.5


def test_exact_sphere_series_check_values():
    # Smythe 1968 image-charge series; values from mpmath at 40 digits; tolerance 1e-8 relative
    c = lm.sphere_capacitance_f(Z, radius_m=R)
    dc, d2c = lm.sphere_capacitance_derivatives(Z, radius_m=R)
    assert c == pytest.approx(4.8343166e-18, rel=1e-7)  # value given to 8 digits
    assert dc == pytest.approx(-4.793651107e-11, rel=1e-8)
    assert d2c == pytest.approx(3.314045268e-3, rel=1e-8)
    assert 0.5 * dc * V**2 == pytest.approx(-5.992063884e-12, rel=1e-8)
    assert lm.sphere_electrostatic_gradient_n_per_m(Z, radius_m=R, voltage_v=V) == pytest.approx(
        4.142556584e-4, rel=1e-8)


@pytest.mark.parametrize("gap_m, force_n", [(1e-9, -1.972598e-10), (300e-9, -6.3099742e-14),
                                            (3000e-9, -6.8850437e-16)])
def test_exact_sphere_force_far_and_near(gap_m, force_n):
    # Smythe 1968 series, mpmath values given to 7-8 digits
    dc, _ = lm.sphere_capacitance_derivatives(gap_m, radius_m=R)
    assert 0.5 * dc * V**2 == pytest.approx(force_n, rel=5e-7)


def test_sphere_limits():
    # proximity limit F -> -pi eps0 R V^2 / z for z << R; far limit -pi eps0 R^2 V^2/(z+R)^2 (Smythe 1968)
    # the proximity correction shrinks like (z/R) ln(R/z): 1e-4 relative at z/R = 1e-5
    z = 1e-5 * R
    dc, _ = lm.sphere_capacitance_derivatives(z, radius_m=R)
    assert 0.5 * dc * V**2 == pytest.approx(-np.pi * lm.EPSILON_0_F_PER_M * R * V**2 / z, rel=1e-4)
    zf = 1e-3
    dc, _ = lm.sphere_capacitance_derivatives(zf, radius_m=R)
    assert 0.5 * dc * V**2 == pytest.approx(-np.pi * lm.EPSILON_0_F_PER_M * R**2 * V**2 / (zf + R) ** 2, rel=1e-4)


def test_sphere_second_derivative_matches_numerical_derivative_of_capacitance():
    z = np.array([3e-9, 20e-9, 150e-9])
    h = 1e-3 * z
    c = [lm.sphere_capacitance_f(z + k * h, radius_m=R) for k in (-2, -1, 0, 1, 2)]
    num = (-c[0] + 16 * c[1] - 30 * c[2] + 16 * c[3] - c[4]) / (12 * h**2)
    _, d2c = lm.sphere_capacitance_derivatives(z, radius_m=R)
    np.testing.assert_allclose(d2c, num, rtol=1e-6)


def test_hudlet_forms():
    # Hudlet et al. 1998; closed-form values, tolerance 1e-6 relative
    assert lm.hudlet_apex_force_n(Z, radius_m=R, voltage_v=V) == pytest.approx(-6.258656566e-12, rel=1e-6)
    assert lm.hudlet_apex_gradient_n_per_m(Z, radius_m=R, voltage_v=V) == pytest.approx(4.381059596e-4, rel=1e-6)
    kw = dict(radius_m=R, voltage_v=V, cone_half_angle_deg=15.0)
    assert lm.hudlet_apex_force_n(Z, **kw) == pytest.approx(-5.4915946e-12, rel=1e-6)
    assert lm.hudlet_apex_gradient_n_per_m(Z, **kw) == pytest.approx(4.0460314e-4, rel=1e-6)
    assert lm.hudlet_cone_force_n(Z, cone_height_m=10e-6, **kw) == pytest.approx(-1.1887442e-11, rel=1e-6)
    assert lm.hudlet_cone_gradient_n_per_m(Z, cone_height_m=10e-6, **kw) == pytest.approx(1.4260032e-4, rel=1e-6)


def test_tip_capacitance_adds_cone():
    base = lm.tip_capacitance_second_derivative_f_per_m2(Z, radius_m=R, cone_half_angle_deg=None)
    both = lm.tip_capacitance_second_derivative_f_per_m2(Z, radius_m=R, cone_half_angle_deg=15.0)
    assert 0.5 * (both - base) * V**2 == pytest.approx(1.4260032e-4, rel=1e-6)


def test_vdw_full_sphere_check_values():
    # Hamaker 1937 / Israelachvili 2011, H = 1e-19 J, R = 30 nm; tolerance 1e-6
    f = lm.vdw_sphere_force_n(np.array([1e-9, 20e-9]), hamaker_j=1e-19, radius_m=R)
    g = lm.vdw_sphere_gradient_n_per_m(np.array([1e-9, 20e-9]), hamaker_j=1e-19, radius_m=R)
    np.testing.assert_allclose(f, [-4.83741e-10, -7.03125e-13], rtol=1e-5)  # values given to 6 digits
    np.testing.assert_allclose(g, [0.983342, 8.78906e-5], rtol=1e-5)
    # proximity limit H R/(3 z^3) for z << R
    z = 1e-11
    assert lm.vdw_sphere_gradient_n_per_m(z, hamaker_j=1e-19, radius_m=R) == pytest.approx(
        1e-19 * R / (3 * z**3), rel=1e-3)


def test_giessibl_exponential_closed_form():
    # Giessibl 1997: F = F0 exp(-d/lambda) gives df = (f0/(k A)) F0 exp(-d_c/lambda) I1(A/lambda);
    # check value 356.519842 Hz for F0 = 1 nN, lambda = 0.5 nm, d_min = 0.3 nm, A = 5 nm, k = 2.8, f0 = 75 kHz
    f0, k, f_0, lam, a = 75e3, 2.8, 1e-9, 0.5e-9, 5e-9
    dc = 0.3e-9 + a
    g = lm.amplitude_weighted(lambda d: -f_0 / lam * np.exp(-d / lam), dc, amplitude_m=a)
    df = -f0 * g / (2 * k)
    assert df == pytest.approx(356.519842, rel=1e-8)
    assert df == pytest.approx(f0 / (k * a) * f_0 * np.exp(-dc / lam) * special.i1(a / lam), rel=1e-9)


def test_giessibl_vdw_finite_amplitude_check_value():
    # vdW proximity sphere F = -H R/(6 d^2) at d_c = 20 nm, A = 10 nm: df = -2.577457 Hz (Giessibl 2001 form)
    g = lm.amplitude_weighted(lambda d: 1e-19 * R / (3 * d**3), 20e-9, amplitude_m=10e-9)
    assert -75e3 * g / (2 * 2.8) == pytest.approx(-2.577457, rel=1e-6)
    # and the quadrature agrees with adaptive integration of the same average
    ref, _ = integrate.quad(lambda t: 1e-19 * R / (3 * (20e-9 + 10e-9 * np.cos(t)) ** 3) * np.sin(t) ** 2, 0, np.pi,
                            epsrel=1e-12)
    assert g == pytest.approx(2 / np.pi * ref, rel=1e-8)


def test_phase_relation_exact_arctan():
    # exact steady state on resonance: phase = -arctan(Q F'/k); F' = 1e-4 N/m, k = 2.8, Q = 200 -> -0.409249 deg;
    # F' = 5e-3 N/m -> -19.6538 deg (the linear form gives -20.4628 deg)
    p = phase.phase_deg_from_gradient(np.array([1e-4, 5e-3]), spring_constant_n_per_m=2.8, quality_factor=200)
    np.testing.assert_allclose(p, [-0.409249, -19.6538], rtol=2e-6)
    back = phase.gradient_from_phase_deg(p, spring_constant_n_per_m=2.8, quality_factor=200)
    np.testing.assert_allclose(back, [1e-4, 5e-3], rtol=1e-12)
    # exact-sphere phase check value: -(Q/k) F' = -0.02958969 rad (small-angle)
    fp = lm.sphere_electrostatic_gradient_n_per_m(Z, radius_m=R, voltage_v=V)
    assert -200 / 2.8 * fp == pytest.approx(-0.02958969, rel=1e-7)


def test_centre_gap_convention_and_errors():
    np.testing.assert_allclose(lm.centre_gap_m([10e-9, 20e-9], amplitude_m=5e-9), [15e-9, 25e-9])
    np.testing.assert_allclose(lm.centre_gap_m([10e-9], amplitude_m=5e-9, gap_offset_m=8e-9), [18e-9])
    # said in the operator's terms: which lift height, what would happen, what to change
    with pytest.raises(ValueError, match="at a lift height of 1 nm the tip would reach the surface.*larger lift"):
        lm.centre_gap_m([1e-9], amplitude_m=10e-9, gap_offset_m=5e-9)
    with pytest.raises(ValueError, match="gap_m"):
        lm.sphere_capacitance_f(-1e-9, radius_m=R)
    with pytest.raises(ValueError, match="cone_half_angle_deg"):
        lm.hudlet_cone_force_n(Z, radius_m=R, voltage_v=1, cone_half_angle_deg=0, cone_height_m=1e-5)
