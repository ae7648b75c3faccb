"""The simulated lever against the published Sader theory (formulas re-written here, not imported)."""

import math

import numpy as np
import pytest
import scipy.special

from simulated_stage.lever import Fluid, air, build_lever, gamma_circular, gamma_rectangular


def sader_k_reference(length, width, f_r, q, rho, eta):
    """Sader, Chon & Mulvaney 1999, Rev. Sci. Instrum. 70, 3967: k = 0.1906 rho b^2 L Q Gamma_i(Re) omega^2,
    Re = rho omega b^2 / (4 eta); Gamma from Sader 1998, J. Appl. Phys. 84, 64 (circular cylinder times the
    rational correction Omega(log10 Re)). Written here independently of the stage code."""
    omega = 2 * math.pi * f_r
    re = rho * omega * width**2 / (4 * eta)
    s = np.sqrt(1j * re)
    g_circ = 1 + 4j * scipy.special.kv(1, -1j * s) / (s * scipy.special.kv(0, -1j * s))
    t = math.log10(re)
    om_r = (0.91324 - 0.48274 * t + 0.46842 * t**2 - 0.12886 * t**3 + 0.044055 * t**4 - 0.0035117 * t**5
            + 0.00069085 * t**6) / (1 - 0.56964 * t + 0.48690 * t**2 - 0.13444 * t**3 + 0.045155 * t**4
                                    - 0.0035862 * t**5 + 0.00069085 * t**6)
    om_i = (-0.024134 - 0.029256 * t + 0.016294 * t**2 - 0.00010961 * t**3 + 0.000064577 * t**4
            - 0.000044510 * t**5) / (1 - 0.59702 * t + 0.55182 * t**2 - 0.18357 * t**3 + 0.079156 * t**4
                                     - 0.014369 * t**5 + 0.0028361 * t**6)
    gamma_i = (complex(om_r, om_i) * g_circ).imag
    return 0.1906 * rho * width**2 * length * q * gamma_i * omega**2


def air_reference(t_k, p_pa=101325.0):
    """Ideal gas (R_s = 287.055 J/(kg K)) and Sutherland 1893, Phil. Mag. 36, 507 (constants of White,
    Viscous Fluid Flow: 1.716e-5 Pa s, 273.15 K, S = 110.4 K); from memory."""
    return p_pa / (287.055 * t_k), 1.716e-5 * (t_k / 273.15) ** 1.5 * (273.15 + 110.4) / (t_k + 110.4)


def test_hydrodynamic_function_values_and_large_re_limit():
    # Values of the Sader 1998 formulas evaluated with scipy.special.kv (complex Bessel functions).
    assert gamma_circular(1.0) == pytest.approx(3.968015 + 4.566571j, abs=1e-6)
    assert gamma_rectangular(10.0) == pytest.approx(1.918318 + 0.981622j, abs=1e-6)
    assert gamma_rectangular(1000.0) == pytest.approx(1.117414 + 0.100611j, abs=1e-6)
    # Branch check: large-Re asymptote 1 + 2 sqrt(2) (1 + i) / sqrt(Re) of the cylinder (Sader 1998)
    re = 1e4
    assert gamma_circular(re) == pytest.approx(1 + 2 * math.sqrt(2) * (1 + 1j) / math.sqrt(re), abs=3e-4)


def test_air_matches_ideal_gas_and_sutherland():
    fluid = air(293.15)
    rho, eta = air_reference(293.15)
    assert fluid.density_kg_m3 == pytest.approx(rho, rel=1e-12)
    assert fluid.viscosity_pa_s == pytest.approx(eta, rel=1e-12)
    assert rho == pytest.approx(1.20410, rel=1e-5)  # handbook-style value at 20 C, 1 atm
    assert eta == pytest.approx(1.81332e-5, rel=1e-5)


def test_authors_worked_example_inputs():
    # Inputs published with the method (397 x 29 um, 17.36 kHz, Q = 55.5, rho 1.18, eta 1.86e-5):
    # our reference formula gives 0.157307 N/m (Sader, Chon & Mulvaney 1999 inputs; output computed).
    assert sader_k_reference(397e-6, 29e-6, 17.36e3, 55.5, 1.18, 1.86e-5) == pytest.approx(0.157307, rel=1e-5)


def test_forward_model_self_consistency_case():
    # Si beam 225 x 28 x 3 um, E = 169 GPa, rho_c = 2330 kg/m^3 in the Sader authors' air (1.18, 1.86e-5):
    # Euler-Bernoulli k = E b h^3 / (4 L^3); forward model of Sader 1998 / Sader et al. 1999.
    fluid = Fluid(1.18, 1.86e-5)
    lever = build_lever(length_m=225e-6, width_m=28e-6, thickness_m=3e-6, material="silicon", fluid=fluid)
    assert lever.spring_constant_n_per_m == pytest.approx(169e9 * 28e-6 * 27e-18 / (4 * 225e-6**3), rel=1e-12)
    assert lever.spring_constant_n_per_m == pytest.approx(2.804148, rel=1e-6)
    assert lever.vacuum_resonance_hz == pytest.approx(81527.08, rel=1e-6)
    assert lever.resonance_hz == pytest.approx(81206.41, rel=1e-6)
    assert lever.quality_factor == pytest.approx(213.194, rel=1e-5)
    k_back = sader_k_reference(225e-6, 28e-6, lever.resonance_hz, lever.quality_factor, 1.18, 1.86e-5)
    assert abs(k_back / lever.spring_constant_n_per_m - 1) < 1e-4  # residual = rounding of 0.1906


@pytest.mark.parametrize("geometry", [(225e-6, 28e-6, 3e-6), (125e-6, 30e-6, 4e-6), (450e-6, 50e-6, 2e-6)])
@pytest.mark.parametrize("t_k", [293.15, 298.15])
def test_lever_in_air_gives_its_k_back_through_sader(geometry, t_k):
    length, width, thickness = geometry
    lever = build_lever(length_m=length, width_m=width, thickness_m=thickness, fluid=air(t_k))
    rho, eta = air_reference(t_k)
    k_back = sader_k_reference(length, width, lever.resonance_hz, lever.quality_factor, rho, eta)
    assert abs(k_back / lever.spring_constant_n_per_m - 1) < 1e-3
    assert lever.warnings == ()


def test_width_derived_from_k_f0_q_obeys_sader():
    fluid = air(298.15)
    lever = build_lever(length_m=225e-6, fluid=fluid, spring_constant_n_per_m=2.8, resonance_hz=75e3,
                        quality_factor=200.0)
    rho, eta = air_reference(298.15)
    assert sader_k_reference(225e-6, lever.width_m, 75e3, 200.0, rho, eta) == pytest.approx(2.8, rel=1e-6)
    assert 20e-6 < lever.width_m < 50e-6
    assert lever.thickness_m is None and lever.warnings == ()


def test_inconsistent_lever_warns_by_how_much():
    fluid = air(298.15)
    lever = build_lever(length_m=225e-6, width_m=38e-6, fluid=fluid, spring_constant_n_per_m=2.8,
                        resonance_hz=75e3, quality_factor=200.0)
    rho, eta = air_reference(298.15)
    expected = sader_k_reference(225e-6, 38e-6, 75e3, 200.0, rho, eta) / 2.8 - 1
    assert lever.sader_mismatch == pytest.approx(expected, rel=1e-6)
    assert len(lever.warnings) == 1 and f"{expected * 100:+.2f} %" in lever.warnings[0]
    # the values given win over the theory
    assert (lever.spring_constant_n_per_m, lever.resonance_hz, lever.quality_factor) == (2.8, 75e3, 200.0)


def test_single_override_keeps_geometry_for_the_rest():
    fluid = air(298.15)
    base = build_lever(length_m=225e-6, width_m=28e-6, thickness_m=3e-6, fluid=fluid)
    q_only = build_lever(length_m=225e-6, width_m=28e-6, thickness_m=3e-6, fluid=fluid, quality_factor=400.0)
    assert q_only.quality_factor == 400.0
    assert q_only.resonance_hz == base.resonance_hz
    assert q_only.sader_mismatch == pytest.approx(400.0 / base.quality_factor - 1, rel=1e-3)
    assert q_only.warnings  # Q doubled: Sader would read 2x


def test_bad_inputs_name_the_problem():
    with pytest.raises(ValueError, match="material"):
        build_lever(length_m=225e-6, width_m=28e-6, thickness_m=3e-6, material="unobtainium", fluid=air(298.15))
    with pytest.raises(ValueError, match="width and thickness"):
        build_lever(length_m=225e-6, fluid=air(298.15), spring_constant_n_per_m=2.8)
