"""van der Waals sphere-plane force and the DMT contact law."""

from __future__ import annotations

import numpy as np
import pytest

from simulated_stage import contact, vdw

H, R = 1e-19, 30e-9


def test_full_sphere_plane_check_values():
    # Full non-retarded sphere-plane form F = -2 H R^3/(3 z^2 (z + 2R)^2) (Hamaker 1937, Physica 4, 1058;
    # Israelachvili 2011, Intermolecular and Surface Forces): H = 1e-19 J, R = 30 nm
    z = np.array([1e-9, 20e-9])
    np.testing.assert_allclose(vdw.sphere_plane_force(z, hamaker_j=H, radius_m=R), [-4.83741e-10, -7.03125e-13],
                               rtol=1e-6)
    np.testing.assert_allclose(vdw.sphere_plane_gradient(z, hamaker_j=H, radius_m=R), [0.983342, 8.78906e-5],
                               rtol=1e-6)
    # proximity form -H R/(6 z^2): -5e-10 N and -1.25e-12 N; it overstates the 20 nm force 1.78x
    np.testing.assert_allclose(vdw.proximity_force(z, hamaker_j=H, radius_m=R), [-5e-10, -1.25e-12], rtol=1e-12)
    ratio = vdw.proximity_force(20e-9, hamaker_j=H, radius_m=R) / vdw.sphere_plane_force(20e-9, hamaker_j=H,
                                                                                           radius_m=R)
    assert ratio == pytest.approx(1.7778, rel=1e-4)


def test_gradient_is_the_derivative_of_the_force():
    z = np.geomspace(0.3e-9, 1e-6, 50)
    h = 1e-5 * z
    fd = (vdw.sphere_plane_force(z + h, hamaker_j=H, radius_m=R)
          - vdw.sphere_plane_force(z - h, hamaker_j=H, radius_m=R)) / (2 * h)
    np.testing.assert_allclose(vdw.sphere_plane_gradient(z, hamaker_j=H, radius_m=R), fd, rtol=1e-7)


def test_far_field_falls_as_z_to_the_minus_four():
    # z >> R: F -> -2 H R^3 / (3 z^4) (sphere as a small body)
    z = 1e-4
    assert vdw.sphere_plane_force(z, hamaker_j=H, radius_m=R) == pytest.approx(-2 * H * R**3 / (3 * z**4), rel=1e-3)


def test_dmt_contact_is_continuous_and_repulsive_inside():
    e_star = contact.reduced_modulus_pa(169e9, 150e9)
    law = contact.ShortRangeForce(hamaker_j=H, radius_m=R, reduced_modulus_pa=e_star)
    a0 = contact.INTERMOLECULAR_DISTANCE_M
    f = law.force(np.array([a0 * (1 + 1e-9), a0 * (1 - 1e-9)]))
    assert f[0] == pytest.approx(f[1], rel=1e-6)
    # adhesion at a0 is the vdW force there (DMT: Derjaguin, Muller & Toporov 1975)
    assert f[0] == pytest.approx(vdw.sphere_plane_force(a0, hamaker_j=H, radius_m=R), rel=1e-6)
    # 1 nm of indentation: F = F(a0) + 4/3 E* sqrt(R) delta^1.5
    delta = 1e-9
    expected = f[0] + 4 / 3 * e_star * np.sqrt(R) * delta**1.5
    assert law.force(np.array([a0 - delta]))[0] == pytest.approx(expected, rel=1e-12)
    assert law.force(np.array([-2e-9]))[0] > 0  # net repulsion when pressed in
    z = np.linspace(-2e-9, 0.1e-9, 41)
    fd = (law.force(z + 1e-13) - law.force(z - 1e-13)) / 2e-13
    np.testing.assert_allclose(law.gradient(z), fd, rtol=1e-5)
    # E* of Si (169 GPa) on 150 GPa with nu = 0.3: 1/E* = 0.91/169e9 + 0.91/150e9
    assert e_star == pytest.approx(1 / (0.91 / 169e9 + 0.91 / 150e9), rel=1e-12)
