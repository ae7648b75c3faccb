"""A rectangular cantilever: stiffness and resonance from its geometry, loading and damping by the air.

The lever obeys the same hydrodynamic theory that the Sader calibration method inverts, so that a
calibration run on the simulated stage gives back the lever's own spring constant. The hydrodynamic function
is implemented here (the stage must not depend on the calibration code).

Sources
-------
* Sader 1998, J. Appl. Phys. 84, 64: hydrodynamic function of a circular cylinder and the rectangular
  correction Omega(Re) (rational fit in log10 Re, stated accuracy about 0.1 % for 1e-6 <= Re <= 1e4).
* Sader, Chon & Mulvaney 1999, Rev. Sci. Instrum. 70, 3967: k = 0.1906 rho b^2 L Q Gamma_i(Re) omega_R^2,
  Re = rho omega_R b^2 / (4 eta); forward model omega_R = omega_vac [1 + pi rho b Gamma_r / (4 rho_c h)]^-1/2,
  Q = [4 rho_c h / (pi rho b) + Gamma_r] / Gamma_i (viscous damping only; from memory).
* Euler-Bernoulli beam: k = E b h^3 / (4 L^3), omega_vac = (alpha1^2 / L^2) sqrt(E h^2 / (12 rho_c)).
* Air: ideal gas with R_s = 287.055 J/(kg K) and Sutherland's law (Sutherland 1893, Phil. Mag. 36, 507;
  constants as in White, Viscous Fluid Flow; from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq
from scipy.special import kv

ALPHA1 = 1.8751040687  # first root of 1 + cos(a) cosh(a) = 0
SADER_COEFFICIENT = 0.1906  # (pi/4) * 3 / alpha1^4, rounded as published
SADER_ACCURACY = 0.005  # relative agreement the theory is trusted to (about 0.5 %, air properties included)
R_SPECIFIC_AIR_J_PER_KG_K = 287.055
_SUTHERLAND_ETA0, _SUTHERLAND_T0, _SUTHERLAND_S = 1.716e-5, 273.15, 110.4

#: Young's modulus [Pa] and density [kg/m^3] of lever materials (handbook values, from memory).
MATERIALS: dict[str, tuple[float, float]] = {
    "silicon": (169e9, 2330.0),  # <110> direction, the usual lever axis
    "silicon_nitride": (250e9, 3100.0),  # low-stress LPCVD film, typical value
}

_OMEGA_R_NUM = (0.91324, -0.48274, 0.46842, -0.12886, 0.044055, -0.0035117, 0.00069085)
_OMEGA_R_DEN = (1.0, -0.56964, 0.48690, -0.13444, 0.045155, -0.0035862, 0.00069085)
_OMEGA_I_NUM = (-0.024134, -0.029256, 0.016294, -0.00010961, 0.000064577, -0.000044510)
_OMEGA_I_DEN = (1.0, -0.59702, 0.55182, -0.18357, 0.079156, -0.014369, 0.0028361)


@dataclass(frozen=True)
class Fluid:
    """The medium around the lever: density [kg/m^3] and dynamic viscosity [Pa s]."""

    density_kg_m3: float
    viscosity_pa_s: float


def air(temperature_k: float, pressure_pa: float = 101_325.0) -> Fluid:
    """Dry air: ideal-gas density and Sutherland viscosity (pressure dependence of eta neglected)."""
    density = pressure_pa / (R_SPECIFIC_AIR_J_PER_KG_K * temperature_k)
    eta = (_SUTHERLAND_ETA0 * (temperature_k / _SUTHERLAND_T0) ** 1.5
           * (_SUTHERLAND_T0 + _SUTHERLAND_S) / (temperature_k + _SUTHERLAND_S))
    return Fluid(density, eta)


def gamma_circular(reynolds: np.ndarray | float) -> np.ndarray:
    """Hydrodynamic function of a circular cylinder, Gamma = 1 + 4i K1(-i sqrt(i Re)) / (sqrt(i Re) K0(...)).

    Sader 1998, J. Appl. Phys. 84, 64 (Bessel functions of complex argument, principal branch).
    """
    s = np.sqrt(1j * np.asarray(reynolds, dtype=complex))
    arg = -1j * s
    return 1.0 + 4j * kv(1, arg) / (s * kv(0, arg))


def gamma_rectangular(reynolds: np.ndarray | float) -> np.ndarray:
    """Hydrodynamic function of a rectangular beam, Omega(Re) * Gamma_circ(Re) (Sader 1998)."""
    re = np.asarray(reynolds, dtype=float)
    tau = np.log10(re)
    om_r = np.polyval(_OMEGA_R_NUM[::-1], tau) / np.polyval(_OMEGA_R_DEN[::-1], tau)
    om_i = np.polyval(_OMEGA_I_NUM[::-1], tau) / np.polyval(_OMEGA_I_DEN[::-1], tau)
    return (om_r + 1j * om_i) * gamma_circular(re)


def reynolds_number(frequency_hz: float, width_m: float, fluid: Fluid) -> float:
    """Re = rho omega b^2 / (4 eta), with the full width b (Sader, Chon & Mulvaney 1999)."""
    return fluid.density_kg_m3 * 2 * math.pi * frequency_hz * width_m**2 / (4 * fluid.viscosity_pa_s)


def sader_spring_constant(length_m: float, width_m: float, resonance_hz: float, quality_factor: float,
                          fluid: Fluid) -> float:
    """Spring constant of a rectangular lever by the Sader method (Sader, Chon & Mulvaney 1999) [N/m]."""
    re = reynolds_number(resonance_hz, width_m, fluid)
    gi = float(np.imag(gamma_rectangular(re)))
    omega = 2 * math.pi * resonance_hz
    return SADER_COEFFICIENT * fluid.density_kg_m3 * width_m**2 * length_m * quality_factor * gi * omega**2


def euler_bernoulli(length_m: float, width_m: float, thickness_m: float, youngs_modulus_pa: float,
                    density_kg_m3: float) -> tuple[float, float]:
    """Static end-load stiffness [N/m] and vacuum first-mode frequency [Hz] of a rectangular beam."""
    k = youngs_modulus_pa * width_m * thickness_m**3 / (4 * length_m**3)
    omega_vac = ALPHA1**2 / length_m**2 * math.sqrt(youngs_modulus_pa * thickness_m**2 / (12 * density_kg_m3))
    return k, omega_vac / (2 * math.pi)


def resonance_in_fluid(vacuum_resonance_hz: float, width_m: float, thickness_m: float, density_kg_m3: float,
                       fluid: Fluid) -> tuple[float, float]:
    """Resonance (peak) frequency [Hz] and quality factor in the fluid (Sader forward model, solved iteratively)."""
    mass_ratio = math.pi * fluid.density_kg_m3 * width_m / (4 * density_kg_m3 * thickness_m)
    f = vacuum_resonance_hz
    for _ in range(200):
        g = complex(gamma_rectangular(reynolds_number(f, width_m, fluid)))
        f_new = vacuum_resonance_hz / math.sqrt(1 + mass_ratio * g.real)
        if abs(f_new - f) <= 1e-14 * f:
            f = f_new
            break
        f = f_new
    g = complex(gamma_rectangular(reynolds_number(f, width_m, fluid)))
    q = (1.0 / mass_ratio + g.real) / g.imag
    return f, q


@dataclass(frozen=True)
class Lever:
    """The first flexural mode of the simulated lever, in the scenario's air.

    ``resonance_hz`` is the resonance in air (the natural frequency of the oscillator model; it differs from
    the peak of the thermal spectrum by a factor sqrt(1 - 1/(2 Q^2)), below 1e-5 for Q > 100).
    ``thickness_m`` and ``vacuum_resonance_hz`` are None when the lever was given by its k, f0 and Q only.
    """

    length_m: float
    width_m: float
    thickness_m: float | None
    spring_constant_n_per_m: float
    resonance_hz: float
    quality_factor: float
    vacuum_resonance_hz: float | None
    fluid: Fluid
    reynolds: float
    sader_mismatch: float  # k_Sader(L, b, f0, Q, air) / k - 1
    warnings: tuple[str, ...] = ()


def _width_from_sader(length_m: float, k: float, f: float, q: float, fluid: Fluid) -> float:
    def residual(log_b: float) -> float:
        return math.log(sader_spring_constant(length_m, math.exp(log_b), f, q, fluid) / k)

    lo, hi = math.log(1e-7), math.log(5e-3)
    if residual(lo) > 0 or residual(hi) < 0:
        raise ValueError(
            f"no lever width between 0.1 um and 5 mm gives k = {k:g} N/m at f0 = {f:g} Hz, Q = {q:g}, "
            f"length = {length_m:g} m in this air")
    return math.exp(brentq(residual, lo, hi, xtol=1e-15, rtol=1e-14))


def build_lever(*, length_m: float, fluid: Fluid, width_m: float | None = None, thickness_m: float | None = None,
                material: str = "silicon", spring_constant_n_per_m: float | None = None,
                resonance_hz: float | None = None, quality_factor: float | None = None) -> Lever:
    """Make a lever from its geometry and material, with optional overrides of k, f0 and Q.

    * geometry only: k from Euler-Bernoulli, f0 and Q in air from the Sader forward model;
    * k, f0 and Q without a width: the width follows so that the Sader theory holds at this length and air;
    * anything else: the given values win, and a warning says how far the lever is from the Sader theory
      when it is off by more than :data:`SADER_ACCURACY`.
    """
    if material not in MATERIALS:
        raise ValueError(f"material = {material!r} is not one of {sorted(MATERIALS)}")
    e_mod, rho_c = MATERIALS[material]
    overrides = (spring_constant_n_per_m, resonance_hz, quality_factor)
    warnings: list[str] = []
    f_vac = None
    if all(v is not None for v in overrides) and width_m is None:
        width_m = _width_from_sader(length_m, spring_constant_n_per_m, resonance_hz, quality_factor, fluid)
        k, f, q = spring_constant_n_per_m, resonance_hz, quality_factor
    elif all(v is not None for v in overrides):
        k, f, q = spring_constant_n_per_m, resonance_hz, quality_factor
    else:
        if width_m is None or thickness_m is None:
            raise ValueError("width and thickness are needed unless spring constant, resonance and quality "
                             "factor are all given")
        k, f_vac = euler_bernoulli(length_m, width_m, thickness_m, e_mod, rho_c)
        f, q = resonance_in_fluid(f_vac, width_m, thickness_m, rho_c, fluid)
        k = spring_constant_n_per_m if spring_constant_n_per_m is not None else k
        f = resonance_hz if resonance_hz is not None else f
        q = quality_factor if quality_factor is not None else q
    mismatch = sader_spring_constant(length_m, width_m, f, q, fluid) / k - 1.0
    if abs(mismatch) > SADER_ACCURACY:
        warnings.append(
            f"lever k = {k:g} N/m, f0 = {f:g} Hz, Q = {q:g} with {length_m * 1e6:g} x {width_m * 1e6:g} um "
            f"differs from the Sader theory in this air by {mismatch * 100:+.2f} % (accuracy about "
            f"{SADER_ACCURACY * 100:g} %): a Sader calibration of it will read {mismatch * 100:+.2f} %")
    re = reynolds_number(f, width_m, fluid)
    if not 1e-6 <= re <= 1e4:
        warnings.append(f"Reynolds number {re:g} is outside the range 1e-6 .. 1e4 of the hydrodynamic fit")
    return Lever(length_m, width_m, thickness_m, k, f, q, f_vac, fluid, re, mismatch, tuple(warnings))
