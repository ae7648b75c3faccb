"""Air density and viscosity against handbook values.

Ideal gas (textbook) with M = 0.0289647 kg/mol, Sutherland 1893 (Phil. Mag. 36, 507) with the constants of
F. M. White, *Viscous Fluid Flow*; reference values of the correlations of Lemmon et al. 2000 (J. Phys.
Chem. Ref. Data 29, 331) and Lemmon & Jacobsen 2004 (Int. J. Thermophys. 25, 21) for dry air at 101325 Pa.
"""

import numpy as np
import pytest

from assistant.analysis.calibration.air import air_density_kg_m3, air_viscosity_pa_s

# T [deg C]: (ideal-gas rho, reference rho, Sutherland eta, reference eta)
TABLE = {
    0: (1.29226, 1.29307, 1.71600e-5, 1.72184e-5),
    20: (1.20410, 1.20458, 1.81332e-5, 1.82057e-5),
    25: (1.18390, 1.18432, 1.83715e-5, 1.84481e-5),
    30: (1.16438, 1.16473, 1.86078e-5, 1.86888e-5),
}


@pytest.mark.parametrize("celsius", sorted(TABLE))
def test_simple_laws_and_reference_correlations(celsius):
    rho_ig, rho_ref, eta_su, eta_ref = TABLE[celsius]
    t = 273.15 + celsius
    rho, eta = air_density_kg_m3(t), air_viscosity_pa_s(t)
    assert rho == pytest.approx(rho_ig, rel=1e-5)
    assert eta == pytest.approx(eta_su, rel=1e-5)
    assert rho == pytest.approx(rho_ref, rel=1e-3)  # ideal gas within 0.1 % at 1 atm
    assert eta == pytest.approx(eta_ref, rel=5e-3)  # Sutherland within 0.5 %


def test_sutherland_reference_point_and_equivalent_form():
    assert air_viscosity_pa_s(273.15) == pytest.approx(1.716e-5, rel=1e-12)
    t = np.array([250.0, 300.0, 350.0])
    # Equivalent single-constant form 1.458e-6 T^1.5 / (T + 110.4) (White): same law, rounded constant.
    np.testing.assert_allclose(air_viscosity_pa_s(t), 1.458e-6 * t**1.5 / (t + 110.4), rtol=2e-4)


def test_density_proportional_to_pressure():
    assert air_density_kg_m3(298.15, 1000.0) == pytest.approx(air_density_kg_m3(298.15) * 1000 / 101325,
                                                              rel=1e-12)


@pytest.mark.parametrize("bad", [0.0, -5.0, np.nan, np.inf])
def test_rejects_non_physical_input(bad):
    with pytest.raises(ValueError, match="temperature_k"):
        air_density_kg_m3(bad)
    with pytest.raises(ValueError, match="temperature_k"):
        air_viscosity_pa_s(bad)
    with pytest.raises(ValueError, match="pressure_pa"):
        air_density_kg_m3(300.0, bad)
