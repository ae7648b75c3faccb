"""Density and viscosity of dry air from temperature and pressure.

Density from the ideal-gas law with the molar mass of dry air; viscosity from Sutherland's law
(Sutherland 1893, Phil. Mag. 36, 507) with the constants tabulated in F. M. White, *Viscous Fluid Flow*.
Both are within 0.1 % (density) and 0.5 % (viscosity) of the reference correlations of Lemmon et al. 2000
(J. Phys. Chem. Ref. Data 29, 331) and Lemmon & Jacobsen 2004 (Int. J. Thermophys. 25, 21) near ambient.
"""

from __future__ import annotations

import numpy as np

from assistant.errors import InputError

__all__ = [
    "DRY_AIR_MOLAR_MASS_KG_PER_MOL", "GAS_CONSTANT_J_PER_MOL_K", "STANDARD_PRESSURE_PA",
    "air_density_kg_m3", "air_viscosity_pa_s",
]

GAS_CONSTANT_J_PER_MOL_K = 8.314462618  # exact, SI 2019 (N_A kB)
DRY_AIR_MOLAR_MASS_KG_PER_MOL = 0.0289647
STANDARD_PRESSURE_PA = 101325.0
_SUTHERLAND_ETA0_PA_S = 1.716e-5
_SUTHERLAND_T0_K = 273.15
_SUTHERLAND_S_K = 110.4


def _positive(name: str, value) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise InputError(f"{name} = {value!r} must be positive and finite")
    return arr


def air_density_kg_m3(temperature_k, pressure_pa=STANDARD_PRESSURE_PA):
    """Ideal-gas density of dry air, rho = p M / (R T).

    Parameters
    ----------
    temperature_k : float or ndarray
        Temperature [K].
    pressure_pa : float or ndarray
        Pressure [Pa] (default 101325 Pa).

    Returns
    -------
    float or ndarray
        Density [kg/m^3].
    """
    t = _positive("temperature_k", temperature_k)
    p = _positive("pressure_pa", pressure_pa)
    rho = p * DRY_AIR_MOLAR_MASS_KG_PER_MOL / (GAS_CONSTANT_J_PER_MOL_K * t)
    return float(rho) if rho.ndim == 0 else rho


def air_viscosity_pa_s(temperature_k):
    """Dynamic viscosity of air by Sutherland's law, eta0 (T/T0)^(3/2) (T0 + S)/(T + S).

    eta0 = 1.716e-5 Pa s, T0 = 273.15 K, S = 110.4 K (White, *Viscous Fluid Flow*). Independent of
    pressure near ambient (kinetic theory), so no pressure argument.

    Parameters
    ----------
    temperature_k : float or ndarray
        Temperature [K].

    Returns
    -------
    float or ndarray
        Viscosity [Pa s].
    """
    t = _positive("temperature_k", temperature_k)
    eta = (_SUTHERLAND_ETA0_PA_S * (t / _SUTHERLAND_T0_K) ** 1.5
           * (_SUTHERLAND_T0_K + _SUTHERLAND_S_K) / (t + _SUTHERLAND_S_K))
    return float(eta) if eta.ndim == 0 else eta
