"""Thermal-noise calibration: k or InvOLS from the fitted thermal peak (:mod:`.thermal_fit`).

The spring constant follows from equipartition (Hutter & Bechhoefer 1993, Rev. Sci. Instrum. 64, 1868) with
the first-mode correction of Butt & Jaschke (1995, Nanotechnology 6, 1): k = beta * kB T / <z1^2> with
beta = 0.817434 for an optical lever calibrated statically and 0.970688 for displacement detection. Given
k instead, the sensitivity follows (non-contact InvOLS, Higgins et al. 2006, Rev. Sci. Instrum. 77, 013701).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from assistant.errors import InputError

from ..constants import BOLTZMANN_J_PER_K
from .spectra import WelchAccumulator
from .thermal_fit import ThermalFit, ThermalFitError, fit_thermal_spectrum

if TYPE_CHECKING:  # the Sader module loads scipy.special; a thermal analysis alone does not need it
    from .sader import SaderResult

__all__ = [
    "DETECTION_FACTORS", "ThermalResult", "analyse_thermal_record", "calibrate_thermal", "default_segment_length",
    "invols_from_thermal", "sader_and_area_log_variance", "spring_constant_from_thermal",
]

# Butt & Jaschke 1995: first-mode factors (optical lever with static InvOLS; displacement detection).
DETECTION_FACTORS = {"optical-lever": 0.817434, "displacement": 0.970688}


def spring_constant_from_thermal(peak_area_v2: float, *, invols_m_per_v: float, temperature_k: float,
                                 correction_factor: float = DETECTION_FACTORS["optical-lever"]) -> float:
    """k = beta kB T / (InvOLS^2 <V1^2>) [N/m] (Hutter & Bechhoefer 1993; Butt & Jaschke 1995)."""
    return correction_factor * BOLTZMANN_J_PER_K * temperature_k / (invols_m_per_v**2 * peak_area_v2)


def invols_from_thermal(peak_area_v2: float, *, k_n_per_m: float, temperature_k: float,
                        correction_factor: float = DETECTION_FACTORS["optical-lever"]) -> float:
    """InvOLS = sqrt(beta kB T / (k <V1^2>)) [m/V] (Higgins et al. 2006, with the Butt-Jaschke factor).

    With beta = 0.817434 it is comparable to a force-curve (static) InvOLS; with 0.970688 it converts volts
    to true first-mode displacement.
    """
    return float(np.sqrt(correction_factor * BOLTZMANN_J_PER_K * temperature_k / (k_n_per_m * peak_area_v2)))


@dataclass(frozen=True, eq=False)
class ThermalResult:
    """Thermal calibration in SI (``invols_m_per_v`` in m/V); ``to_dict`` gives the command-line keys."""

    f0_hz: float
    f0_std_hz: float
    q: float
    q_std: float
    peak_area_v2: float
    peak_area_std_v2: float
    k_n_per_m: float | None
    k_std_n_per_m: float | None
    invols_m_per_v: float | None
    invols_std_m_per_v: float | None
    temperature_k: float
    correction_factor: float
    detection: str
    fit: ThermalFit
    warnings: tuple[str, ...]

    def to_dict(self) -> dict[str, float | None]:
        def opt(x, factor=1.0):
            return None if x is None else float(x) * factor
        return {
            "f0_hz": float(self.f0_hz), "f0_std_hz": float(self.f0_std_hz), "q": float(self.q),
            "q_std": float(self.q_std), "peak_area_v2": float(self.peak_area_v2),
            "k_n_per_m": opt(self.k_n_per_m), "k_std_n_per_m": opt(self.k_std_n_per_m),
            "invols_nm_per_v": opt(self.invols_m_per_v, 1e9),
            "invols_std_nm_per_v": opt(self.invols_std_m_per_v, 1e9), "temperature_k": float(self.temperature_k),
            "correction_factor": float(self.correction_factor),
        }


def sader_and_area_log_variance(fit: ThermalFit, sader: SaderResult, temperature_k: float) -> float:
    """Variance of ln(k_Sader * <V1^2> / T) when the Sader k took f0 and Q from this thermal fit.

    The peak area A0 pi Q f0 / 2 and the Sader k share f0 and Q, so their errors correlate (first-order
    propagation through the fit's covariance, g^T C g, with g = d ln(k area) / d(f0, Q, A0)); the plan view
    (independent of the fit) and the temperature (in T and in the air's properties) are added apart. Both the
    non-contact InvOLS (= sqrt(beta kB T / (k area)), Higgins et al. 2006) and the ratio of a thermal k to the
    Sader k (Hutter & Bechhoefer 1993; Sader et al. 1999) have this variance, the first times 1/4.
    """
    s = sader.log_sensitivities
    g = np.zeros(len(fit.parameter_names))
    for name, value, exponent in (("f0_hz", fit.f0_hz, 1.0 + s["f0"]), ("q", fit.q, 1.0 + s["q"]),
                                  ("a0_v2_per_hz", fit.a0_v2_per_hz, 1.0)):
        g[fit.parameter_names.index(name)] = exponent / value
    plan = sader.relative_contributions["length"] ** 2 + sader.relative_contributions["width"] ** 2
    rel_t = (1.0 - s["temperature"]) * sader.temperature_std_k / temperature_k
    return float(g @ fit.covariance @ g + plan + rel_t**2)


def calibrate_thermal(fit: ThermalFit, *, temperature_k: float = 298.15, invols_m_per_v: float | None = None,
                      k_n_per_m: float | None = None, detection: str = "optical-lever",
                      invols_std_m_per_v: float = 0.0, k_std_n_per_m: float = 0.0,
                      temperature_std_k: float = 0.0, sader: SaderResult | None = None) -> ThermalResult:
    """Turn a peak fit into k (given InvOLS) or InvOLS (given k); neither: k and InvOLS are None.

    Uncertainties combine the fit's peak-area error with the given errors of InvOLS, k and T in quadrature
    (first-order propagation). ``sader``: the given k is this Sader k, from this fit's f0 and Q; the
    InvOLS's uncertainty then follows :func:`sader_and_area_log_variance` (``k_std_n_per_m`` and
    ``temperature_std_k`` are not used).

    Raises
    ------
    ValueError
        Unknown detection, both InvOLS and k given, or a non-positive input.
    """
    if detection not in DETECTION_FACTORS:
        raise InputError(f"detection = {detection!r}; allowed: {sorted(DETECTION_FACTORS)}")
    if invols_m_per_v is not None and k_n_per_m is not None:
        raise InputError("give either invols_m_per_v (to get k) or k_n_per_m (to get InvOLS), not both")
    for name, value in (("temperature_k", temperature_k), ("invols_m_per_v", invols_m_per_v),
                        ("k_n_per_m", k_n_per_m)):
        if value is not None and not (np.isfinite(value) and value > 0):
            raise InputError(f"{name} = {value!r} must be positive and finite")
    beta = DETECTION_FACTORS[detection]
    area, rel_area = fit.peak_area_v2, fit.peak_area_std_v2 / fit.peak_area_v2
    rel_t = temperature_std_k / temperature_k
    k = k_std = inv = inv_std = None
    if invols_m_per_v is not None:
        inv = invols_m_per_v
        k = spring_constant_from_thermal(area, invols_m_per_v=inv, temperature_k=temperature_k,
                                         correction_factor=beta)
        k_std = k * float(np.sqrt(rel_area**2 + (2 * invols_std_m_per_v / inv) ** 2 + rel_t**2))
    elif k_n_per_m is not None:
        k = k_n_per_m
        k_std = k_std_n_per_m
        inv = invols_from_thermal(area, k_n_per_m=k, temperature_k=temperature_k, correction_factor=beta)
        if sader is not None:
            inv_std = 0.5 * inv * float(np.sqrt(sader_and_area_log_variance(fit, sader, temperature_k)))
        else:
            inv_std = 0.5 * inv * float(np.sqrt(rel_area**2 + (k_std_n_per_m / k) ** 2 + rel_t**2))
    return ThermalResult(
        f0_hz=fit.f0_hz, f0_std_hz=fit.f0_std_hz, q=fit.q, q_std=fit.q_std, peak_area_v2=area,
        peak_area_std_v2=fit.peak_area_std_v2, k_n_per_m=k, k_std_n_per_m=k_std, invols_m_per_v=inv,
        invols_std_m_per_v=inv_std if inv_std is not None else (invols_std_m_per_v if inv else None),
        temperature_k=float(temperature_k), correction_factor=beta, detection=detection, fit=fit,
        warnings=fit.warnings)


def default_segment_length(n_samples: int) -> int:
    """Largest power of two <= n_samples / 8, capped at 2**18 (at least 15 averaged segments)."""
    if n_samples < 2048:
        raise ThermalFitError(f"record too short: {n_samples} samples, need at least 2048")
    return int(min(2**18, 2 ** int(np.floor(np.log2(n_samples / 8)))))


def analyse_thermal_record(volts: np.ndarray, rate_hz: float, *, temperature_k: float = 298.15,
                           invols_m_per_v: float | None = None, k_n_per_m: float | None = None,
                           detection: str = "optical-lever", segment_length: int | None = None,
                           f0_guess_hz: float | None = None, fit_range_hz: tuple[float, float] | None = None,
                           background: str = "white+1/f", chunk_samples: int = 2**20) -> ThermalResult:
    """Streaming Welch spectrum of a deflection record, peak fit, and k or InvOLS.

    Parameters
    ----------
    volts : ndarray
        1-D deflection record [V] (float32 is fine; it is converted chunk by chunk).
    rate_hz : float
        Sampling rate [Hz].
    temperature_k : float, keyword-only
        Temperature [K] (default 298.15 K).
    invols_m_per_v, k_n_per_m : float, optional
        Static InvOLS [m/V] (gives k) or k [N/m] (gives the non-contact InvOLS).
    detection : {"optical-lever", "displacement"}
        Selects the Butt-Jaschke factor 0.817434 or 0.970688.
    segment_length : int, optional
        Welch segment length; default :func:`default_segment_length`.
    f0_guess_hz, fit_range_hz, background
        Passed to :func:`fit_thermal_spectrum`.
    chunk_samples : int
        Samples fed to the accumulator at a time (bounds the memory).

    Returns
    -------
    ThermalResult

    Raises
    ------
    ThermalFitError
        Empty, too short, non-finite or constant record; no peak; peak too close to Nyquist.
    """
    x = np.asarray(volts)
    if x.ndim != 1:
        raise ThermalFitError(f"record must be 1-D, got shape {x.shape}")
    if x.size == 0:
        raise ThermalFitError("record is empty")
    n = default_segment_length(x.size) if segment_length is None else int(segment_length)
    acc = WelchAccumulator(rate_hz, n)
    lo, hi = np.inf, -np.inf
    try:
        for start in range(0, x.size, chunk_samples):
            chunk = x[start:start + chunk_samples]
            acc.add(chunk)
            lo, hi = min(lo, float(np.min(chunk))), max(hi, float(np.max(chunk)))
        spec = acc.result()
    except ValueError as exc:
        raise ThermalFitError(f"deflection record rejected: {exc}") from exc
    if lo == hi:
        raise ThermalFitError(f"record is constant (every sample = {lo!r} V): no thermal motion recorded")
    fit = fit_thermal_spectrum(spec.frequencies_hz, spec.psd_v2_per_hz, averages=spec.n_segments,
                               variance_inflation=spec.variance_inflation, f0_guess_hz=f0_guess_hz,
                               fit_range_hz=fit_range_hz, background=background, spectrum=spec)
    return calibrate_thermal(fit, temperature_k=temperature_k, invols_m_per_v=invols_m_per_v,
                             k_n_per_m=k_n_per_m, detection=detection)
