"""Sader method for rectangular cantilevers.

Spring constant (Sader, Chon & Mulvaney 1999, Rev. Sci. Instrum. 70, 3967)::

    k = 0.1906 rho b^2 L Q Gamma_i(Re) omega_R^2,    Re = rho omega_R b^2 / (4 eta)

with the hydrodynamic function of a rectangular beam Gamma_rect = Omega(Re) Gamma_circ(Re) (Sader 1998,
J. Appl. Phys. 84, 64): Gamma_circ from modified Bessel functions of complex argument and Omega from the
published rational fits in tau = log10(Re).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.special

from assistant.errors import InputError

from .air import STANDARD_PRESSURE_PA, air_density_kg_m3, air_viscosity_pa_s

__all__ = [
    "SaderResult", "hydrodynamic_circular", "hydrodynamic_rectangular", "omega_correction",
    "sader_spring_constant",
]

SADER_PREFACTOR = 0.1906  # (pi/4) M_e with M_e = 0.2427 (Sader 1999)
REYNOLDS_RANGE = (1e-6, 1e4)  # stated validity of the Omega fits (Sader 1998)
# Default relative uncertainties when none is given (common practice, no source): optical measurement
# of plan-view dimensions, a resonance fit's f0 and Q.
DEFAULT_RELATIVE_STD = {"length": 0.01, "width": 0.02, "f0": 0.001, "q": 0.02}
DEFAULT_TEMPERATURE_STD_K = 1.0
_MIN_ASPECT = 3.0
_MIN_Q = 10.0  # "Q >> 1": below this the method's error grows (common practice, no source)
_MIN_PRESSURE_PA = 5e3  # continuum flow assumed; mean free path matters below a few kPa

_OMEGA_R_NUM = (0.91324, -0.48274, 0.46842, -0.12886, 0.044055, -0.0035117, 0.00069085)
_OMEGA_R_DEN = (1.0, -0.56964, 0.48690, -0.13444, 0.045155, -0.0035862, 0.00069085)
_OMEGA_I_NUM = (-0.024134, -0.029256, 0.016294, -0.00010961, 0.000064577, -0.000044510)
_OMEGA_I_DEN = (1.0, -0.59702, 0.55182, -0.18357, 0.079156, -0.014369, 0.0028361)


def hydrodynamic_circular(reynolds):
    """Hydrodynamic function of a circular cylinder (Sader 1998, J. Appl. Phys. 84, 64).

    Gamma_circ(Re) = 1 + 4 i K1(-i sqrt(i Re)) / (sqrt(i Re) K0(-i sqrt(i Re))).

    Parameters
    ----------
    reynolds : float or ndarray
        Reynolds number rho omega b^2 / (4 eta), > 0.

    Returns
    -------
    complex or ndarray of complex
    """
    re = np.asarray(reynolds, dtype=float)
    s = np.sqrt(1j * re)
    z = -1j * s  # = exp(-i pi/4) sqrt(Re): right half-plane, principal branch
    # Exponentially scaled Bessel functions: same ratio as kv, no underflow at large Re.
    out = 1.0 + 4j * scipy.special.kve(1, z) / (s * scipy.special.kve(0, z))
    return complex(out) if out.ndim == 0 else out


def omega_correction(reynolds):
    """Omega(Re) = Gamma_rect / Gamma_circ, the rational fits of Sader 1998 in tau = log10(Re)."""
    tau = np.log10(np.asarray(reynolds, dtype=float))
    re_part = np.polyval(_OMEGA_R_NUM[::-1], tau) / np.polyval(_OMEGA_R_DEN[::-1], tau)
    im_part = np.polyval(_OMEGA_I_NUM[::-1], tau) / np.polyval(_OMEGA_I_DEN[::-1], tau)
    out = re_part + 1j * im_part
    return complex(out) if np.ndim(out) == 0 else out


def hydrodynamic_rectangular(reynolds):
    """Gamma_rect(Re) = Omega(Re) Gamma_circ(Re) (Sader 1998)."""
    return omega_correction(reynolds) * hydrodynamic_circular(reynolds)


@dataclass(frozen=True)
class SaderResult:
    """Sader spring constant and the quantities behind it (SI)."""

    k_n_per_m: float
    k_std_n_per_m: float
    reynolds: float
    gamma_real: float
    gamma_imag: float
    density_kg_m3: float
    viscosity_pa_s: float
    relative_contributions: dict[str, float]  # each input's share of the relative standard deviation
    # signed d ln k / d ln x of each input (length, width, f0, q, temperature): what a caller needs to combine k with
    # another quantity from the same f0 and Q (the thermal peak area), whose errors correlate with these
    log_sensitivities: dict[str, float]
    temperature_std_k: float  # the one taken for the air's properties (0 with a given density and viscosity)
    warnings: tuple[str, ...]

    def to_dict(self) -> dict[str, float]:
        return {
            "k_n_per_m": float(self.k_n_per_m), "k_std_n_per_m": float(self.k_std_n_per_m),
            "reynolds": float(self.reynolds), "gamma_imag": float(self.gamma_imag),
            "density_kg_m3": float(self.density_kg_m3), "viscosity_pa_s": float(self.viscosity_pa_s),
        }


def _k(length_m, width_m, f0_hz, q, rho, eta):
    omega = 2.0 * np.pi * f0_hz
    re = rho * omega * width_m**2 / (4.0 * eta)
    gamma = hydrodynamic_rectangular(re)
    return SADER_PREFACTOR * rho * width_m**2 * length_m * q * gamma.imag * omega**2, re, gamma


def sader_spring_constant(length_m: float, width_m: float, f0_hz: float, q: float, *,
                          temperature_k: float = 298.15, pressure_pa: float = STANDARD_PRESSURE_PA,
                          density_kg_m3: float | None = None, viscosity_pa_s: float | None = None,
                          length_std_m: float | None = None, width_std_m: float | None = None,
                          f0_std_hz: float | None = None, q_std: float | None = None,
                          temperature_std_k: float | None = None) -> SaderResult:
    """Spring constant of a rectangular cantilever by the Sader method (Sader, Chon & Mulvaney 1999).

    Parameters
    ----------
    length_m, width_m : float
        Plan-view length and width [m].
    f0_hz : float
        Resonance (peak) frequency of the fundamental flexural mode in the fluid [Hz].
    q : float
        Quality factor in the fluid.
    temperature_k, pressure_pa : float, keyword-only
        Air temperature [K] and pressure [Pa]; give the density and viscosity from them
        (:mod:`.air`) unless ``density_kg_m3``/``viscosity_pa_s`` are given.
    length_std_m, width_std_m, f0_std_hz, q_std, temperature_std_k : float, optional
        Standard uncertainties; defaults 1 % (length), 2 % (width), 0.1 % (f0), 2 % (Q), 1 K (the
        temperature, only when the air properties come from it).

    Returns
    -------
    SaderResult
        With ``warnings`` for L/b < 3, Q < 10, Reynolds number outside 1e-6..1e4 and pressure below 5 kPa.

    Notes
    -----
    The uncertainty is first-order propagation with logarithmic derivatives computed by central
    differences of the full formula (so the Re dependence of Gamma_i is included).
    """
    for name, value in (("length_m", length_m), ("width_m", width_m), ("f0_hz", f0_hz), ("q", q),
                        ("temperature_k", temperature_k), ("pressure_pa", pressure_pa),
                        ("density_kg_m3", density_kg_m3), ("viscosity_pa_s", viscosity_pa_s)):
        if value is not None and not (np.isfinite(value) and value > 0):
            raise InputError(f"{name} = {value!r} must be positive and finite")
    fixed_fluid = density_kg_m3 is not None and viscosity_pa_s is not None

    def fluid(t):
        rho = density_kg_m3 if density_kg_m3 is not None else air_density_kg_m3(t, pressure_pa)
        eta = viscosity_pa_s if viscosity_pa_s is not None else air_viscosity_pa_s(t)
        return rho, eta

    rho, eta = fluid(temperature_k)
    k, re, gamma = _k(length_m, width_m, f0_hz, q, rho, eta)
    stds = {
        "length": length_std_m if length_std_m is not None else DEFAULT_RELATIVE_STD["length"] * length_m,
        "width": width_std_m if width_std_m is not None else DEFAULT_RELATIVE_STD["width"] * width_m,
        "f0": f0_std_hz if f0_std_hz is not None else DEFAULT_RELATIVE_STD["f0"] * f0_hz,
        "q": q_std if q_std is not None else DEFAULT_RELATIVE_STD["q"] * q,
        "temperature": 0.0 if fixed_fluid else (
            temperature_std_k if temperature_std_k is not None else DEFAULT_TEMPERATURE_STD_K),
    }
    values = {"length": length_m, "width": width_m, "f0": f0_hz, "q": q, "temperature": temperature_k}
    eps = 1e-5
    contributions, sensitivities = {}, {}
    for name, value in values.items():
        if name == "temperature" and fixed_fluid:
            contributions[name] = sensitivities[name] = 0.0
            continue
        args_hi, args_lo = dict(values), dict(values)
        args_hi[name], args_lo[name] = value * (1 + eps), value * (1 - eps)
        k_hi = _k(args_hi["length"], args_hi["width"], args_hi["f0"], args_hi["q"], *fluid(args_hi["temperature"]))[0]
        k_lo = _k(args_lo["length"], args_lo["width"], args_lo["f0"], args_lo["q"], *fluid(args_lo["temperature"]))[0]
        dlnk_dlnx = (np.log(k_hi) - np.log(k_lo)) / (2 * eps)
        sensitivities[name] = float(dlnk_dlnx)
        contributions[name] = float(abs(dlnk_dlnx) * stds[name] / value)
    rel = float(np.sqrt(sum(c * c for c in contributions.values())))
    notes = []
    if length_m / width_m < _MIN_ASPECT:
        notes.append(f"length/width = {length_m / width_m:.3g} < {_MIN_ASPECT}: the long-beam theory "
                     "behind the method does not hold")
    if q < _MIN_Q:
        notes.append(f"Q = {q:.3g} < {_MIN_Q}: the method assumes Q >> 1")
    if not REYNOLDS_RANGE[0] <= re <= REYNOLDS_RANGE[1]:
        notes.append(f"Reynolds number {re:.3g} outside {REYNOLDS_RANGE[0]:g}..{REYNOLDS_RANGE[1]:g}, the "
                     "range of the published fits for Omega")
    if density_kg_m3 is None and pressure_pa < _MIN_PRESSURE_PA:
        notes.append(f"pressure {pressure_pa:.4g} Pa < {_MIN_PRESSURE_PA:g} Pa: continuum flow is no "
                     "longer a good assumption")
    return SaderResult(
        k_n_per_m=float(k), k_std_n_per_m=float(k * rel), reynolds=float(re), gamma_real=float(gamma.real),
        gamma_imag=float(gamma.imag), density_kg_m3=float(rho), viscosity_pa_s=float(eta),
        relative_contributions=contributions, log_sensitivities=sensitivities,
        temperature_std_k=float(stds["temperature"]), warnings=tuple(notes))
