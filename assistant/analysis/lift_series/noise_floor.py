"""Noise floor of a second pass: the thermal limit and the phase noise measured from the data.

Amplitude convention: ``amplitude_m`` is the **peak** oscillation amplitude A, so the mean-square
oscillation amplitude entering the thermal limit is ``<z_osc^2> = A^2 / 2``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from assistant.errors import InputError

from ..constants import BOLTZMANN_J_PER_K
from .phase import linear_phase_slope_deg

__all__ = [
    "thermal_min_gradient_n_per_m",
    "thermal_min_phase_deg",
    "periodic_component_of",
    "white_noise_std",
    "NoiseVerdict",
    "noise_verdict",
]


def thermal_min_gradient_n_per_m(*, spring_constant_n_per_m: float, resonance_hz: float, quality_factor: float,
                                 temperature_k: float, bandwidth_hz: float, amplitude_m: float,
                                 amplitude_is_rms: bool = False) -> float:
    """Thermally limited minimum detectable force gradient (rms, signal-to-noise 1).

    ``dF'_min = sqrt(4 k kB T B / (omega0 Q <z_osc^2>))`` (Albrecht, Grutter, Horne & Rugar 1991,
    J. Appl. Phys. 69, 668; from memory), frequency-modulation detection.

    Parameters
    ----------
    spring_constant_n_per_m, resonance_hz, quality_factor : float
        k [N/m], f0 [Hz] (omega0 = 2 pi f0), Q.
    temperature_k : float
        T [K].
    bandwidth_hz : float
        Detection bandwidth B [Hz].
    amplitude_m : float
        Oscillation amplitude [m]: peak by default (``<z^2> = A^2/2``), rms if ``amplitude_is_rms``.

    Returns
    -------
    float
        dF'_min [N/m].
    """
    for name, v in (("spring_constant_n_per_m", spring_constant_n_per_m), ("resonance_hz", resonance_hz),
                    ("quality_factor", quality_factor), ("temperature_k", temperature_k),
                    ("bandwidth_hz", bandwidth_hz), ("amplitude_m", amplitude_m)):
        if not (np.isfinite(v) and v > 0):
            raise InputError(f"{name} must be finite and > 0, got {v!r}")
    z2 = amplitude_m**2 if amplitude_is_rms else amplitude_m**2 / 2.0
    w0 = 2.0 * np.pi * resonance_hz
    return float(np.sqrt(4.0 * spring_constant_n_per_m * BOLTZMANN_J_PER_K * temperature_k * bandwidth_hz
                         / (w0 * quality_factor * z2)))


def thermal_min_phase_deg(*, spring_constant_n_per_m: float, resonance_hz: float, quality_factor: float,
                          temperature_k: float, bandwidth_hz: float, amplitude_m: float,
                          amplitude_is_rms: bool = False) -> float:
    """Thermal phase noise (rms) ``Q dF'_min / k`` expressed in degrees (small-angle form of the
    phase relation; Albrecht et al. 1991 for dF'_min)."""
    g = thermal_min_gradient_n_per_m(
        spring_constant_n_per_m=spring_constant_n_per_m, resonance_hz=resonance_hz,
        quality_factor=quality_factor, temperature_k=temperature_k, bandwidth_hz=bandwidth_hz,
        amplitude_m=amplitude_m, amplitude_is_rms=amplitude_is_rms)
    return float(g * linear_phase_slope_deg(spring_constant_n_per_m=spring_constant_n_per_m,
                                            quality_factor=quality_factor))


def periodic_component_of(image: np.ndarray) -> np.ndarray:
    """Periodic component of the periodic-plus-smooth decomposition (Moisan 2011, J. Math. Imaging Vis. 39,
    161; from memory).

    A scan is not periodic: the FFT sees a step where opposite edges meet, whose spectrum falls off only as
    1/|q| and would read as high-frequency noise. The smooth component, whose discrete Laplacian is the
    boundary jumps, carries that step; the periodic component keeps the rest of the image, noise included.
    """
    u = np.asarray(image, dtype=float)
    rows, cols = u.shape
    v = np.zeros_like(u)
    jr = u[-1, :] - u[0, :]
    jc = u[:, -1] - u[:, 0]
    v[0, :] += jr
    v[-1, :] -= jr
    v[:, 0] += jc
    v[:, -1] -= jc
    cr = np.cos(2.0 * np.pi * np.arange(rows) / rows)[:, None]
    cc = np.cos(2.0 * np.pi * np.arange(cols) / cols)[None, :]
    den = 2.0 * cr + 2.0 * cc - 4.0
    den[0, 0] = 1.0
    sf = np.fft.fft2(v) / den
    sf[0, 0] = 0.0
    return u - np.fft.ifft2(sf).real


def white_noise_std(image: np.ndarray, *, band_fraction: float = 0.7, periodic_component: bool = True) -> float:
    """Standard deviation of the white noise in an image from its highest spatial frequencies.

    The power in the band ``|q| >= band_fraction * q_Nyquist`` (per axis, taken radially) is averaged and
    scaled as white noise (Parseval). Valid where the signal has no power there: for the highest lift
    height of a series the magnetic contrast decays as exp(-|q| h) and is negligible at these
    frequencies once h exceeds about two pixels. NaN pixels must be filled beforehand. By default the
    periodic component (:func:`periodic_component_of`) is analysed, so the seam of a non-periodic scan does
    not count as noise.
    """
    img = np.asarray(image, dtype=float)
    rows, cols = img.shape
    if periodic_component:
        img = periodic_component_of(img)
    f = np.fft.rfft2(img - img.mean())
    qr = np.fft.fftfreq(rows)[:, None] * 2.0
    qc = np.fft.rfftfreq(cols)[None, :] * 2.0
    rad = np.sqrt(qr**2 + qc**2)  # in units of the Nyquist frequency
    band = rad >= band_fraction
    if not np.any(band):
        raise InputError(f"band_fraction {band_fraction!r} leaves no frequencies (limit: < sqrt(2))")
    power = np.abs(f[band]) ** 2
    return float(np.sqrt(power.mean() / (rows * cols)))


@dataclass(frozen=True)
class NoiseVerdict:
    """Measured phase noise against the thermal limit.

    Attributes
    ----------
    measured_phase_noise_deg : float
        Per-pixel rms phase noise found in the data [deg].
    thermal_phase_noise_deg : float or None
        Thermal limit for the given bandwidth [deg]; None without the needed inputs.
    thermal_gradient_n_per_m : float or None
        Thermal minimum detectable gradient [N/m].
    ratio : float or None
        measured / thermal.
    verdict : str
        "thermal_limit", "excess_noise", "below_thermal_limit" or "unknown".
    sentence : str
        Plain-language statement.
    """

    measured_phase_noise_deg: float
    thermal_phase_noise_deg: float | None
    thermal_gradient_n_per_m: float | None
    ratio: float | None
    verdict: str
    sentence: str


def noise_verdict(measured_phase_noise_deg: float, *, spring_constant_n_per_m: float | None = None,
                  resonance_hz: float | None = None, quality_factor: float | None = None,
                  temperature_k: float = 298.15, bandwidth_hz: float | None = None,
                  amplitude_m: float | None = None, tolerance: float = 1.5) -> NoiseVerdict:
    """Compare the measured phase noise with the thermal limit (Albrecht et al. 1991).

    ``tolerance``: measured within ``[thermal / tolerance, thermal * tolerance]`` counts as at the thermal
    limit (common practice, no source). Above that, something else (detector, lock-in, drift of the phase
    reference, vibration) dominates; clearly below it, the stated bandwidth or calibration is suspect.
    """
    m = float(measured_phase_noise_deg)
    needed = (spring_constant_n_per_m, resonance_hz, quality_factor, bandwidth_hz, amplitude_m)
    if any(v is None for v in needed):
        return NoiseVerdict(m, None, None, None, "unknown",
                            f"Measured phase noise {m:.3g}° rms; the thermal limit needs k, f0, Q, the "
                            "bandwidth and the amplitude.")
    g = thermal_min_gradient_n_per_m(spring_constant_n_per_m=spring_constant_n_per_m, resonance_hz=resonance_hz,
                                     quality_factor=quality_factor, temperature_k=temperature_k,
                                     bandwidth_hz=bandwidth_hz, amplitude_m=amplitude_m)
    t = float(g * linear_phase_slope_deg(spring_constant_n_per_m=spring_constant_n_per_m,
                                         quality_factor=quality_factor))
    r = m / t
    if r > tolerance:
        v, s = "excess_noise", (f"Phase noise {m:.3g}° rms is {r:.2g} × the thermal limit {t:.3g}°: "
                                "another source (detector, lock-in, vibration, drift) dominates.")
    elif r < 1.0 / tolerance:
        v, s = "below_thermal_limit", (f"Phase noise {m:.3g}° rms is below the thermal limit {t:.3g}° "
                                       f"(ratio {r:.2g}): check the bandwidth, k and Q given.")
    else:
        v, s = "thermal_limit", (f"Phase noise {m:.3g}° rms is at the thermal limit {t:.3g}° "
                                 f"(ratio {r:.2g}).")
    return NoiseVerdict(m, t, g, r, v, s)
