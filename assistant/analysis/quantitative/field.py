"""The stray field of a sample under test from its MFM image and a stored TTF, with a per-pixel uncertainty.

Per spatial frequency the image is ``F'(k) = TTF(k) Hz(k, z)``; the field at the measurement plane z follows by a
regularised (pseudo-Wiener) deconvolution, limited to the TTF's valid band with raised-cosine edges, and any higher
plane by the Laplace continuation exp(-k dz) (every component of a field above its sources decays so; Hug et al.
1998, J. Appl. Phys. 83, 5609, from memory). The mean (k = 0) is not measured and is set to zero.

Regularisation: ``Hz = W(k) F'(k) / TTF(k)`` with the optimal (Wiener) gain ``W = P_signal / (P_signal + P_noise)``
per ring of spatial frequency, the signal power estimated as the image's ring power minus the noise power
(optimal filtering with the power spectra measured on the data itself: Press et al., Numerical Recipes, 2nd ed.
1992, sec. 13.3, from memory; the pseudo-Wiener filter of Hu et al. 2020, J. Magn. Magn. Mater. 511, 166947, from
the abstract). A single Tikhonov parameter chosen by GCV (as for the TTF) does not work here: inside its band the
TTF varies only a few-fold, so the filter factor TTF^2/(TTF^2 + beta) is nearly the same for every component and
the GCV function is flat (measured on the stage's maps: its minimum sat at the end of the search range).

The TTF is used through its isotropic profile (a real value per ring, interpolated linearly in k), so a
non-periodic scan is deconvolved in the cosine basis of the scan reflected at its edges: nothing jumps where the
edges meet, and only a margin about one longest band period wide sees the reflection (``FieldMap.margin_px``;
the uncertainty map does not include that edge error).

Uncertainty by Monte Carlo (in the spirit of the PTB follow-up to IEC TS 62607-9-1:2021, from a news item): each
draw perturbs the image by noise of the measured level (estimated from its highest spatial frequencies), the TTF
ring by ring by its standard uncertainty, the reference's Ms and t (the TTF scales as 1/(Ms (1 - exp(-kt)))), the
ratio of the (k/Q) calibrations of sample and reference, and the noise level that sets the Wiener gain (log-uniform
within a factor two either way; our choice, no source); the standard deviation over the draws is
the map's standard uncertainty. Not included: the error of the reference pattern beyond what the ring scatter
shows, and a tip that changes between the reference and the sample.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from assistant.analysis.background import remove_plane
from assistant.analysis.quantitative import fourier as fr
from assistant.analysis.quantitative.conversion import amplitude_weight
from assistant.errors import InputError

__all__ = ["FieldMap", "FieldInputError", "reconstruct_field", "band_taper", "OUTSIDE_BAND_WARNING"]

OUTSIDE_BAND_WARNING = 0.2    # warn when this share of the image's signal power lies outside the band
_LOW_RAMP, _HIGH_RAMP = 2.0, 0.85    # raised-cosine edges: k_lo .. 2 k_lo and 0.85 k_hi .. k_hi


class FieldInputError(InputError):
    """The image cannot be deconvolved with this TTF (no overlap with the band, bad height); message says why."""


@dataclass(frozen=True)
class FieldMap:
    """Hz of a sample under test (SI units) and how it was obtained.

    ``hz_a_per_m`` and ``hz_std_a_per_m`` are (rows, cols) at ``height_m`` above the sample's surface;
    ``plane_m`` is the measurement plane of the image; ``band_k_per_m`` the band the map contains;
    ``margin_px`` the width of the edge strip where the reflection at the scan's edges matters (non-periodic
    images); ``signal_outside_band`` the share of the image's signal power at periods outside the band;
    ``wiener_gain_min`` the smallest Wiener gain inside the band (1 = no regularisation needed).
    """

    hz_a_per_m: np.ndarray
    hz_std_a_per_m: np.ndarray
    height_m: float
    plane_m: float
    pixel_m: tuple[float, float]
    band_k_per_m: tuple[float, float]
    wiener_gain_min: float
    noise_n_per_m: float
    draws: int
    margin_px: int
    signal_outside_band: float
    warnings: tuple[str, ...]

    @property
    def band_periods_m(self) -> tuple[float, float]:
        return 2.0 * math.pi / self.band_k_per_m[1], 2.0 * math.pi / self.band_k_per_m[0]


def band_taper(k_per_m: np.ndarray, band_k_per_m: tuple[float, float]) -> np.ndarray:
    """The band the map contains: raised-cosine ramps from 0 at k_lo to 1 at 2 k_lo and from 1 at 0.85 k_hi to 0
    at k_hi, 1 between, 0 outside.

    The gentle low edge keeps band-passing local: a filter sharp in k has a long kernel, and band-passing a scan
    then depends on the field far outside it. Measured on synthetic maze crops (192-256 px, band from a sixth of
    the scan): with a ramp over a quarter of k_lo the map differed from the film's band-passed field by 10-17 % rms
    beyond the edge margin; with a ramp over the band's longest octave by 2-3 %. The short end's ramp only stops
    ringing (common practice, no source)."""
    k = np.asarray(k_per_m, dtype=float)
    lo, hi = band_k_per_m
    out = ((k >= lo) & (k <= hi)).astype(float)
    up = (k >= lo) & (k < _LOW_RAMP * lo)
    out[up] = 0.5 - 0.5 * np.cos(np.pi * (k[up] - lo) / ((_LOW_RAMP - 1.0) * lo))
    down = (k > _HIGH_RAMP * hi) & (k <= hi)
    out[down] = 0.5 + 0.5 * np.cos(np.pi * (k[down] - _HIGH_RAMP * hi) / ((1.0 - _HIGH_RAMP) * hi))
    return out


def _profile_on(k: np.ndarray, ring_k: np.ndarray, values: np.ndarray) -> np.ndarray:
    ok = np.isfinite(values)
    return np.interp(k, ring_k[ok], values[ok])


def _correlated(rng: np.random.Generator, n: int, size: int, rho: float) -> np.ndarray:
    """(n, size) standard normal sequences with lag-one correlation ``rho`` along the last axis (AR(1))."""
    e = rng.standard_normal((n, size))
    if rho > 0.0:
        c = math.sqrt(1.0 - rho * rho)
        for j in range(1, size):
            e[:, j] = rho * e[:, j - 1] + c * e[:, j]
    return e


def reconstruct_field(gradient_n_per_m: np.ndarray, *, pixel_m: float | tuple[float, float], plane_m: float,
                      ring_k_per_m: np.ndarray, ttf_n_per_a: np.ndarray, ttf_std_n_per_a: np.ndarray,
                      band_k_per_m: tuple[float, float], height_m: float | None = None, periodic: bool = False,
                      ms_rel_std: float = 0.0, thickness_m: float | None = None, thickness_std_m: float = 0.0,
                      calibration_rel_std: float = 0.0, amplitude_m: float | None = None,
                      ttf_amplitude_m: float | None = None, ring_correlation: float = 0.0, draws: int = 64,
                      rng: np.random.Generator | None = None, plane_std_m: float = 0.0) -> FieldMap:
    """Hz [A/m] of a sample under test from its force-gradient image and a TTF profile (module docstring).

    Parameters
    ----------
    gradient_n_per_m : (rows, cols) F' image [N/m] at the measurement plane.
    pixel_m : pixel spacing [m], one value or (row, column).
    plane_m : measurement plane above the sample's surface [m] (closest approach of the tip).
    ring_k_per_m, ttf_n_per_a, ttf_std_n_per_a : the TTF profile [rad/m, N/A, N/A]; NaN outside the band.
    band_k_per_m : (k_lo, k_hi) of the TTF's valid band [rad/m].
    height_m : plane of the map [m], >= ``plane_m`` (default: the measurement plane).
    periodic : the image is one period of the sample (Fourier basis instead of the reflected cosine basis).
    ms_rel_std, thickness_m, thickness_std_m : the reference's Ms (relative) and t uncertainties.
    calibration_rel_std : relative standard uncertainty of (k/Q)_sample / (k/Q)_reference (0 when both images
        were converted with the same calibration: the factor then cancels).
    amplitude_m, ttf_amplitude_m : peak amplitudes of this image and of the calibration image [m]; with both,
        the TTF is carried over to this amplitude by the ratio of the oscillation weights
        (``conversion.amplitude_weight``), which holds for any tip.
    ring_correlation : correlation of the TTF's errors between neighbouring rings (an AR(1) sequence over the
        rings; 0 = independent): errors of the reference pattern make neighbouring rings err together.
    plane_std_m : standard uncertainty of the difference between the reference's and this image's measurement
        planes [m] (each assumed where it is not): a TTF calibrated with its plane off by e is TTF exp(-k e), and
        an image taken off its plane by e holds Hz exp(-k e), so the map errs by exp(k (e_ref - e_image)).
    draws : Monte Carlo draws (>= 8).
    rng : random generator (default: seeded with 0, so a map is reproducible).
    """
    image = np.asarray(gradient_n_per_m, dtype=float)
    if image.ndim != 2 or min(image.shape) < 16 or not np.all(np.isfinite(image)):
        raise FieldInputError(f"the image must be 2-D, at least 16 x 16 and finite, got shape {image.shape}")
    if not (math.isfinite(plane_m) and plane_m > 0):
        raise FieldInputError(f"the measurement plane {plane_m!r} m must be > 0")
    height = plane_m if height_m is None else float(height_m)
    if not math.isfinite(height) or height < plane_m - 1e-12:
        raise FieldInputError(f"height {height * 1e9:.4g} nm is below the measurement plane {plane_m * 1e9:.4g} nm: "
                              "the field can be continued upwards only (downwards the noise grows without bound)")
    if draws < 8:
        raise InputError(f"draws = {draws} must be >= 8")
    if not (plane_std_m >= 0 and math.isfinite(plane_std_m)):
        raise InputError(f"the measurement plane's uncertainty {plane_std_m!r} m must be a finite number >= 0")
    rng = rng if rng is not None else np.random.default_rng(0)
    pixel = fr.pixel_pair(pixel_m)
    grid = fr.SpectralGrid(image.shape, pixel, periodic=periodic)
    k = grid.k
    k_nyq = min(math.pi / pixel[0], math.pi / pixel[1])
    k_lo_img = 2.0 * math.pi / (max(image.shape[0] * pixel[0], image.shape[1] * pixel[1]))
    lo, hi = band_k_per_m
    warnings: list[str] = []
    if hi <= 2.0 * k_lo_img or lo >= k_nyq:
        raise FieldInputError(f"the TTF's valid band ({2 * math.pi / hi * 1e9:.0f}-{2 * math.pi / lo * 1e9:.0f} nm) "
                              f"does not overlap the periods this image holds ({2 * math.pi / k_nyq * 1e9:.0f}-"
                              f"{2 * math.pi / k_lo_img * 1e9:.0f} nm)")
    if hi > k_nyq:
        warnings.append(f"the image's pixels ({pixel[1] * 1e9:.3g} nm) cut the band at {2 * pixel[1] * 1e9:.3g} nm "
                        f"periods; the TTF holds down to {2 * math.pi / hi * 1e9:.0f} nm")
        hi = k_nyq
    band = (lo, hi)
    taper = band_taper(k, band)
    ttf = _profile_on(k, ring_k_per_m, ttf_n_per_a)
    if amplitude_m and ttf_amplitude_m:
        ttf = ttf * amplitude_weight(k, amplitude_m) / amplitude_weight(k, ttf_amplitude_m)
    data = grid.forward(image - image.mean() if periodic else remove_plane(image))  # as for the TTF
    noise = grid.noise_power(data, k_nyq)
    cont = np.exp(-k * (height - plane_m))
    w = np.broadcast_to(grid.weight, k.shape)
    dk, _ = fr.ring_edges(image.shape, pixel)
    rings = fr.ring_index(k, dk)
    count = np.bincount(rings.ravel(), w.ravel())
    ring_power = np.bincount(rings.ravel(), (w * np.abs(data) ** 2).ravel()) / np.maximum(count, 1.0)

    gain = np.clip(1.0 - noise / np.maximum(ring_power, 1e-300), 0.0, 1.0)[rings]
    excess = np.maximum(np.abs(data) ** 2 - noise, 0.0) * w
    excess.flat[0] = 0.0
    total = float(excess.sum())
    outside = float(excess[taper < 0.5].sum() / total) if total > 0 else 0.0
    if outside > OUTSIDE_BAND_WARNING:
        warnings.append(f"{100 * outside:.0f} % of the image's signal power lies at periods the map leaves out "
                        f"(outside the TTF's valid band {2 * math.pi / hi * 1e9:.0f}-{2 * math.pi / lo * 1e9:.0f} nm, "
                        "or in its longest octave, where the map tapers off)")

    base = taper * cont / ttf
    hz = grid.inverse(data * gain * base)
    # Monte Carlo, in blocks of draws (a block of 16 spectra of a 512 x 512 image is about 34 MB). Every perturbation
    # but the image noise depends on |k| only, so each draw's filter is a factor per ring of the image's rings
    # (ring width 2 pi / L), gathered onto the grid once.
    sigma = math.sqrt(noise / grid.norm)
    ring_k = np.asarray(ring_k_per_m, dtype=float)
    finite = np.flatnonzero(np.isfinite(np.asarray(ttf_n_per_a, dtype=float)))
    k_rings = np.arange(ring_power.size) * dk                 # the image's ring centres
    pos = np.interp(k_rings, ring_k[finite], np.arange(finite.size, dtype=float))
    j0 = np.minimum(np.floor(pos).astype(np.intp), finite.size - 2)
    frac = pos - j0
    rel_rings = np.interp(k_rings, ring_k, np.nan_to_num(np.asarray(ttf_std_n_per_a) / np.abs(ttf_n_per_a)))
    thick_rings = -np.expm1(-k_rings * thickness_m) if thickness_m and thickness_std_m else None
    # The draws of the cosine basis run in single precision (half the transform time; the spread of 64 draws is
    # known to a few per cent, far above float32 rounding), and only the components the filter passes are drawn
    # (base is zero outside the band). Sums are taken of the deviations from the map itself, so that the variance
    # is not a small difference of two large numbers.
    centre = hz if periodic else hz.astype(np.float32)
    if not periodic:
        passed = np.flatnonzero(base)                         # flat indices of the cosine components drawn
        data_p = data.ravel()[passed].astype(np.float32)
        base_p = base.ravel()[passed].astype(np.float32)
        rings_p = rings.ravel()[passed]
    acc = np.zeros_like(image)
    acc2 = np.zeros_like(image)
    done = 0
    while done < draws:
        n = min(16, draws - done)
        if periodic:
            spec = data[None] + grid.forward(sigma * rng.standard_normal((n,) + image.shape))
        else:   # orthonormal cosine basis: white noise has independent coefficients of the same variance
            spec = data_p[None] + np.float32(sigma) * rng.standard_normal((n, passed.size), dtype=np.float32)
        eps = _correlated(rng, n, finite.size, ring_correlation)
        factor = 1.0 / (1.0 + rel_rings * (eps[:, j0] * (1.0 - frac) + eps[:, j0 + 1] * frac))
        factor *= (1.0 + ms_rel_std * rng.standard_normal(n) + calibration_rel_std * rng.standard_normal(n))[:, None]
        if thick_rings is not None:   # the TTF scales as 1/(1 - exp(-kt)), so Hz as (1 - exp(-kt))
            ti = np.maximum(thickness_m + thickness_std_m * rng.standard_normal(n), 1e-12)
            with np.errstate(invalid="ignore", divide="ignore"):
                factor *= np.nan_to_num(-np.expm1(-k_rings[None] * ti[:, None]) / thick_rings, nan=1.0)
        if plane_std_m:
            factor *= np.exp(k_rings[None] * plane_std_m * rng.standard_normal(n)[:, None])
        levels = noise * 2.0 ** rng.uniform(-1.0, 1.0, n)
        factor *= np.clip(1.0 - levels[:, None] / np.maximum(ring_power, 1e-300)[None], 0.0, 1.0)
        if periodic:
            filtered = spec * base * factor[:, rings]
        else:
            filtered = np.zeros((n, image.size), np.float32)
            filtered[:, passed] = spec * base_p * factor.astype(np.float32)[:, rings_p]
            filtered = filtered.reshape((n,) + image.shape)
        dev = grid.inverse(filtered) - centre
        acc += dev.sum(axis=0)
        acc2 += np.einsum("ijk,ijk->jk", dev, dev)
        done += n
    mean = acc / draws
    std = np.sqrt(np.maximum(acc2 / draws - mean * mean, 0.0) * draws / (draws - 1))
    # the reflection at the scan's edges misleads the map within about one longest band period of an edge
    # (measured on synthetic crops: beyond it the Monte Carlo's 2-sigma band held 94-96 % of the pixels)
    margin = 0 if periodic else int(math.ceil(2.0 * math.pi / lo / min(pixel)))
    return FieldMap(hz_a_per_m=hz, hz_std_a_per_m=std, height_m=height, plane_m=plane_m, pixel_m=pixel,
                    band_k_per_m=band, wiener_gain_min=float(gain[taper > 0].min()), noise_n_per_m=sigma, draws=draws,
                    margin_px=margin,
                    signal_outside_band=outside, warnings=tuple(warnings))
