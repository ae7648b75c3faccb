"""Tip-induced changes of the film: irreversible switching and the reversible (soft-film) response."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate

from simulated_stage import magnetism as mg
from simulated_stage.sample import SampleSpec, build_sample
from simulated_stage.tip import TipSpec, point_probe_field

SPEC = dict(pattern="stripes", extent_um=2.56, roughness_nm=0.0)
X = np.linspace(-1e-6, 1e-6, 200)


def test_point_probe_field_on_axis():
    # dipole on axis: H_z = 2m/(4 pi d^3) = m/(2 pi d^3): 15 915.4943 A/m for 1e-16 A m^2 at 100 nm
    _, _, hz = point_probe_field(np.array([0.0]), np.array([0.0]), np.array([100e-9]), moment_a_m2=1e-16,
                                 monopole_a_m=0.0)
    assert hz[0] == pytest.approx(15915.4943, rel=1e-9)
    # monopole: H = q/(4 pi d^2) pointing away from the charge (down, below it)
    _, _, hz = point_probe_field(np.array([0.0]), np.array([0.0]), np.array([100e-9]), moment_a_m2=0.0,
                                 monopole_a_m=1e-8)
    assert hz[0] == pytest.approx(-1e-8 / (4 * np.pi * 1e-14), rel=1e-12)


def test_irreversible_switching_persists_and_changes_the_next_pass():
    sample = build_sample(SampleSpec(coercive_field_ka_per_m=150.0, **SPEC), TipSpec())
    before = sample.interaction(X, 0.0, 40e-9, bias_v=0.3, amplitude_m=10e-9).magnetic_gradient_n_per_m
    _, mz0 = sample.magnetisation_maps()
    switched = sample.expose(X, np.zeros_like(X), np.full_like(X, 2e-9))
    assert switched > 0 and sample.magnetisation_version == 1
    _, mz1 = sample.magnetisation_maps()
    changed = mz1 != mz0
    assert int(changed.sum()) == switched
    # directly under the tip the film now points along the tip moment (+z): down domains were written up
    rows = np.nonzero(changed.any(axis=1))[0]
    y = mg.pixel_centres_m(sample.n, sample.pixel_m)
    assert np.all(np.abs(y[rows]) < 60e-9)
    centre_row = np.argmin(np.abs(y - 5e-9))
    assert np.all(mz1[centre_row, np.abs(y) < 0.9e-6] > 0)
    # the same pass again switches nothing; a pass far away does not undo it
    assert sample.expose(X, np.zeros_like(X), np.full_like(X, 2e-9)) == 0
    assert sample.expose(X, np.zeros_like(X), np.full_like(X, 500e-9)) == 0
    np.testing.assert_array_equal(sample.magnetisation_maps()[1], mz1)
    assert sample.magnetisation_version == 1
    after = sample.interaction(X, 0.0, 40e-9, bias_v=0.3, amplitude_m=10e-9).magnetic_gradient_n_per_m
    down = np.cos(2 * np.pi * X / 400e-9) < -0.5
    assert np.all(after[down] != pytest.approx(before[down], rel=0.1))
    # the down domains now look like up domains under the line: their gradient changed sign
    assert np.mean(np.sign(after[down]) == np.sign(before[down])) < 0.1
    # far from the written line nothing changed
    far_before = before  # (same y), compare a line 1 um away instead
    line_far = sample.interaction(X, 0.8e-6, 40e-9, bias_v=0.3, amplitude_m=10e-9).magnetic_gradient_n_per_m
    fresh = build_sample(SampleSpec(coercive_field_ka_per_m=150.0, **SPEC), TipSpec())
    np.testing.assert_allclose(line_far, fresh.interaction(X, 0.8e-6, 40e-9, bias_v=0.3,
                                                           amplitude_m=10e-9).magnetic_gradient_n_per_m,
                               rtol=0, atol=1e-3 * np.abs(far_before).max())


def test_hard_film_is_not_switched():
    sample = build_sample(SampleSpec(coercive_field_ka_per_m=5000.0, **SPEC), TipSpec())
    assert sample.expose(X, np.zeros_like(X), np.zeros_like(X)) == 0
    assert sample.magnetisation_version == 0


def test_in_plane_film_switches_along_its_axis():
    sample = build_sample(SampleSpec(pattern="inplane_bits", coercive_field_ka_per_m=100.0, extent_um=2.56),
                          TipSpec())
    mx0, mz0 = sample.magnetisation_maps()
    assert sample.expose(X, np.zeros_like(X), np.full_like(X, 1e-9)) > 0
    mx1, mz1 = sample.magnetisation_maps()
    assert np.any(mx1 != mx0) and not np.any(mz1)
    np.testing.assert_array_equal(np.abs(mx1), np.abs(mx0))


def test_induced_response_matches_a_numerical_field_energy():
    # U = -(mu0 chi/2) integral |H_tip|^2 over the slab (linear soft film, chi << 1); F = -dU/ds.
    # Field of the point probe from point_probe_field, integrated with scipy (independent of the closed form).
    chi, t, m, q = 0.05, 20e-9, 1e-16, -3e-9

    def energy(s):
        def integrand(rho, depth):
            hx, hy, hz = point_probe_field(rho, 0.0, depth, moment_a_m2=m, monopole_a_m=q)
            return (hx * hx + hy * hy + hz * hz) * 2 * np.pi * rho
        val = integrate.dblquad(integrand, s, s + t, 0.0, 200 * s, epsabs=0, epsrel=1e-10)[0]
        return -0.5 * mg.MU_0 * chi * val

    s, h = 40e-9, 0.2e-9
    f_num = -(energy(s + h) - energy(s - h)) / (2 * h)
    f, g = mg.induced_response(np.array([s]), susceptibility=chi, thickness_m=t, moment_a_m2=m, monopole_a_m=q)
    assert f[0] == pytest.approx(f_num, rel=1e-4)
    assert f[0] < 0 and g[0] > 0
    h = 0.02e-9
    f_plus, _ = mg.induced_response(np.array([s + h]), susceptibility=chi, thickness_m=t, moment_a_m2=m,
                                    monopole_a_m=q)
    f_minus, _ = mg.induced_response(np.array([s - h]), susceptibility=chi, thickness_m=t, moment_a_m2=m,
                                     monopole_a_m=q)
    assert g[0] == pytest.approx((f_plus[0] - f_minus[0]) / (2 * h), rel=1e-4)


def test_reversible_response_attracts_over_up_and_down_domains():
    points = np.array([0.0, 200e-9])  # centre of an up and of a down domain
    hard = build_sample(SampleSpec(**SPEC), TipSpec())
    soft = build_sample(SampleSpec(susceptibility=0.05, **SPEC), TipSpec())
    for amp in (0.0, 10e-9):
        g_hard = hard.interaction(points, 0.0, 30e-9, bias_v=0.3, amplitude_m=amp).magnetic_gradient_n_per_m
        g_soft = soft.interaction(points, 0.0, 30e-9, bias_v=0.3, amplitude_m=amp).magnetic_gradient_n_per_m
        extra = g_soft - g_hard
        assert np.all(extra > 0)                       # attractive (F' > 0) over both domains
        assert extra[0] == pytest.approx(extra[1], rel=1e-6)
        assert np.sign(g_hard[0]) != np.sign(g_hard[1])
    # A = 0: the closed form at probe height 60 nm (gap 30 nm + effective distance 30 nm)
    _, g = mg.induced_response(np.array([60e-9]), susceptibility=0.05, thickness_m=20e-9, moment_a_m2=1e-16,
                               monopole_a_m=0.0)
    g_hard = hard.interaction(points, 0.0, 30e-9, bias_v=0.3, amplitude_m=0.0).magnetic_gradient_n_per_m
    g_soft = soft.interaction(points, 0.0, 30e-9, bias_v=0.3, amplitude_m=0.0).magnetic_gradient_n_per_m
    assert g_soft[0] - g_hard[0] == pytest.approx(g[0], rel=1e-5)
    assert soft.magnetisation_version == 0


def test_cached_maps_are_updated_in_place_after_switching():
    """The local update of the cached node maps equals a rebuild from the switched magnetisation."""
    # 5.12 um film: on a 2.56 um film the rebuilt reference itself carries ~1e-3 of the change from the
    # periodic images of the written line's net moment (0.4 um padding), which the local update avoids
    sample = build_sample(SampleSpec(pattern="oop_tracks", coercive_field_ka_per_m=150.0, extent_um=5.12,
                                     roughness_nm=0.0), TipSpec())
    xx = np.linspace(-1.2e-6, 1.2e-6, 240)
    gaps = np.array([10e-9, 40e-9, 100e-9])
    before = [sample.interaction(xx, 0.1e-6, g, bias_v=0.3, amplitude_m=10e-9) for g in gaps]
    assert sample.expose(xx, np.full_like(xx, 0.1e-6), np.full_like(xx, 1e-9)) > 0
    nodes = len(sample.magnetic.nodes)
    updated = [sample.interaction(xx, 0.1e-6, g, bias_v=0.3, amplitude_m=10e-9) for g in gaps]
    assert len(sample.magnetic.nodes) == nodes  # no rebuild was needed
    sample.magnetic.clear()
    rebuilt = [sample.interaction(xx, 0.1e-6, g, bias_v=0.3, amplitude_m=10e-9) for g in gaps]
    for b, u, r in zip(before, updated, rebuilt):
        change = np.abs(r.magnetic_gradient_n_per_m - b.magnetic_gradient_n_per_m).max()
        assert change > 0
        err = np.abs(u.magnetic_gradient_n_per_m - r.magnetic_gradient_n_per_m).max()
        assert err < 1e-4 * change  # measured <= 2e-7 of the change (gradient and force)
        np.testing.assert_allclose(u.force_n, r.force_n, rtol=0, atol=1e-4 * np.abs(r.force_n - b.force_n).max())
