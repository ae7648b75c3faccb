"""Finite-amplitude weighting (Giessibl 1997, Phys. Rev. B 56, 16010; Giessibl 2001, Appl. Phys. Lett. 78, 123)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special

from simulated_stage import averaging as av
from simulated_stage import vdw

K, F0_HZ = 2.8, 75e3


def _exp_force(f0_n: float, lam_m: float):
    return (lambda d: f0_n * np.exp(-d / lam_m)), (lambda d: -f0_n / lam_m * np.exp(-d / lam_m))


def test_exponential_force_closed_form():
    # F = F0 exp(-d/lambda): Delta f = (f0/(k A)) F0 exp(-d_c/lambda) I1(A/lambda) (Giessibl 1997);
    # F0 = 1 nN, lambda = 0.5 nm, d_min = 0.3 nm, A = 5 nm, k = 2.8 N/m, f0 = 75 kHz -> 356.519842 Hz
    force, grad = _exp_force(1e-9, 0.5e-9)
    amp, d_c = 5e-9, 0.3e-9 + 5e-9
    closed = F0_HZ / (K * amp) * 1e-9 * np.exp(-d_c / 0.5e-9) * special.i1(amp / 0.5e-9)
    assert closed == pytest.approx(356.519842, rel=1e-8)
    df_gradient = -F0_HZ / (2 * K) * av.weighted_gradient(grad, np.array([d_c]), amp, nodes=256)[0]
    df_force = -F0_HZ / (2 * K) * av.giessibl_force_form(force, np.array([d_c]), amp, nodes=256)[0]
    assert df_gradient == pytest.approx(356.519842, rel=1e-8)
    assert df_force == pytest.approx(356.519842, rel=1e-8)


def test_small_amplitude_gives_the_plain_gradient():
    # d = 2 nm: 490.5977 Hz at A -> 0 vs -f0 F'/(2k) = 490.5975 Hz (same source)
    force, grad = _exp_force(1e-9, 0.5e-9)
    plain = -F0_HZ / (2 * K) * grad(2e-9)
    assert plain == pytest.approx(490.5975, rel=1e-6)
    for amp in (1e-12, 1e-11):
        weighted = -F0_HZ / (2 * K) * av.weighted_gradient(grad, np.array([2e-9]), amp)[0]
        assert weighted == pytest.approx(plain, rel=1e-3 * (amp / 1e-11) ** 2 + 1e-12)
    assert av.weighted_gradient(grad, np.array([2e-9]), 0.0)[0] == grad(2e-9)


def test_vdw_sphere_at_ten_nanometre_amplitude():
    # F = -H R/(6 d^2), H = 1e-19 J, R = 30 nm, d_c = 20 nm, A = 10 nm: Delta f = -2.577457 Hz
    # (small-amplitude value -1.674107 Hz); finite amplitude matters at lift amplitudes
    def grad(d):
        return 1e-19 * 30e-9 / (3 * d**3)
    df = -F0_HZ / (2 * K) * av.weighted_gradient(grad, np.array([20e-9]), 10e-9, nodes=256)[0]
    assert df == pytest.approx(-2.577457, rel=1e-6)
    assert -F0_HZ / (2 * K) * grad(20e-9) == pytest.approx(-1.674107, rel=1e-6)


def test_bessel_weights_of_an_exponential_component_verified_numerically():
    # <exp(-k(d + q))>_gradient = exp(-k d) 2 I1(kA)/(kA) and <.>_time = exp(-k d) I0(kA):
    # check the closed forms against direct quadrature of the Giessibl integrals (scipy.integrate.quad)
    d, amp = 40e-9, 10e-9
    for k in (1e5, 1e7, 2 * np.pi / 400e-9, 1e8, 5e8):
        g_num = integrate.quad(lambda q: np.exp(-k * (d + q)) * np.sqrt(amp**2 - q**2), -amp, amp,
                               epsabs=0, epsrel=1e-12)[0] * 2 / (np.pi * amp**2)
        t_num = integrate.quad(lambda th: np.exp(-k * (d + amp * np.cos(th))), 0, np.pi,
                               epsabs=0, epsrel=1e-12)[0] / np.pi
        scale = np.exp(-k * (d - amp))
        assert scale * av.exponential_gradient_weight(np.array([k]), amp)[0] == pytest.approx(g_num, rel=1e-9)
        assert scale * av.exponential_force_weight(np.array([k]), amp)[0] == pytest.approx(t_num, rel=1e-9)
    assert av.exponential_gradient_weight(np.array([0.0]), amp)[0] == 1.0


def test_averaged_table_matches_direct_quadrature():
    # vdW sphere-plane force, A = 10 nm: the spline table reproduces the adaptive integral
    h, r, amp = 1e-19, 30e-9, 10e-9
    table = av.AveragedTable(lambda z: vdw.sphere_plane_force(z, hamaker_j=h, radius_m=r),
                             lambda z: vdw.sphere_plane_gradient(z, hamaker_j=h, radius_m=r), amp)
    centres = np.array([10.3e-9, 11e-9, 13.7e-9, 20e-9, 55e-9, 300e-9])
    f, g = table(centres)
    for c, fi, gi in zip(centres, f, g):
        g_ref = integrate.quad(lambda q: vdw.sphere_plane_gradient(c + q, hamaker_j=h, radius_m=r)
                               * np.sqrt(amp**2 - q**2), -amp, amp, epsabs=0, epsrel=1e-11, limit=200)[0]
        g_ref *= 2 / (np.pi * amp**2)
        f_ref = integrate.quad(lambda th: vdw.sphere_plane_force(c + amp * np.cos(th), hamaker_j=h, radius_m=r),
                               0, np.pi, epsabs=0, epsrel=1e-11, limit=200)[0] / np.pi
        assert gi == pytest.approx(g_ref, rel=1e-5)
        assert fi == pytest.approx(f_ref, rel=1e-5)


def test_chebyshev_rules_are_normalised():
    for kind in (1, 2):
        x, w = av.chebyshev_nodes(33, kind)
        assert w.sum() == pytest.approx(1.0, rel=1e-14)
        assert np.all(np.abs(x) < 1)
