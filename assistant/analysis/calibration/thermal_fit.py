"""Maximum-likelihood fit of the first flexural peak of a thermal deflection spectrum.

Model of the one-sided deflection spectrum in V^2/Hz (simple harmonic oscillator in a heat bath plus a
white and a 1/f detector background; e.g. Cook et al. 2006, Nanotechnology 17, 2135)::

    S(f) = B + C / f + A0 / [ (1 - (f/f0)^2)^2 + (f / (f0 Q))^2 ]

Its peak area is <V1^2> = A0 * pi * Q * f0 / 2. The fit maximises the likelihood of the averaged
periodogram (Norrelykke & Flyvbjerg 2010, Rev. Sci. Instrum. 81, 075103): minimise
``sum_k [P_k / S_k + ln S_k]``, by Fisher scoring (iteratively reweighted least squares with the weights
frozen during each step, which converges to the maximum-likelihood point), and takes the covariance from the
inverse Fisher matrix ``n * sum_k dS_k dS_k^T / S_k^2``, scaled for the correlations of a Welch estimate.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .spectra import WelchSpectrum
from .thermal_peak import ThermalFitError
from .thermal_peak import find_peak as _find_peak

__all__ = ["ThermalFit", "ThermalFitError", "fit_thermal_spectrum", "oscillator_psd"]

_MAX_F0_OVER_NYQUIST = 0.8  # common practice, no source: keep the peak clear of aliasing and filters
_MIN_BINS_PER_FWHM = 10.0  # resolution condition (Sader et al. 2011, Rev. Sci. Instrum. 82, 095104)
_MIN_SIGNIFICANCE = 5.0  # peak area / its standard error


def oscillator_psd(frequencies_hz: np.ndarray, *, f0_hz: float, q: float, a0_v2_per_hz: float,
                   white_v2_per_hz: float = 0.0, one_over_f_v2: float = 0.0) -> np.ndarray:
    """Oscillator plus background spectrum S(f) [V^2/Hz] (model of the module docstring).

    Parameters
    ----------
    frequencies_hz : ndarray
        Frequencies [Hz], > 0 where ``one_over_f_v2`` is non-zero.
    f0_hz, q : float
        Resonance frequency [Hz] and quality factor.
    a0_v2_per_hz : float
        Oscillator term at zero frequency [V^2/Hz].
    white_v2_per_hz, one_over_f_v2 : float
        White level B [V^2/Hz] and 1/f coefficient C [V^2].
    """
    f = np.asarray(frequencies_hz, dtype=float)
    u = f / f0_hz
    out = a0_v2_per_hz / ((1.0 - u * u) ** 2 + (u / q) ** 2) + white_v2_per_hz
    if one_over_f_v2:
        out = out + one_over_f_v2 / f
    return out


@dataclass(frozen=True, eq=False)
class ThermalFit:
    """Maximum-likelihood fit of the thermal peak. Parameters in SI; ``covariance`` in the order
    ``parameter_names``; ``frequencies_hz``/``psd_v2_per_hz`` are the data inside the fit window."""

    f0_hz: float
    q: float
    a0_v2_per_hz: float
    white_v2_per_hz: float
    one_over_f_v2: float
    covariance: np.ndarray
    parameter_names: tuple[str, ...]
    fit_range_hz: tuple[float, float]
    frequencies_hz: np.ndarray
    psd_v2_per_hz: np.ndarray
    averages: float
    variance_inflation: float
    iterations: int
    warnings: tuple[str, ...]
    spectrum: WelchSpectrum | None = None

    def _std(self, name: str) -> float:
        i = self.parameter_names.index(name)
        return float(np.sqrt(self.covariance[i, i]))

    @property
    def f0_std_hz(self) -> float:
        return self._std("f0_hz")

    @property
    def q_std(self) -> float:
        return self._std("q")

    @property
    def peak_area_v2(self) -> float:
        """<V1^2> = A0 pi Q f0 / 2 [V^2]."""
        return float(np.pi * self.a0_v2_per_hz * self.q * self.f0_hz / 2.0)

    @property
    def peak_area_std_v2(self) -> float:
        grad = np.zeros(len(self.parameter_names))
        area = self.peak_area_v2
        for name, value in (("f0_hz", self.f0_hz), ("q", self.q), ("a0_v2_per_hz", self.a0_v2_per_hz)):
            grad[self.parameter_names.index(name)] = area / value
        return float(np.sqrt(grad @ self.covariance @ grad))

    def model(self, frequencies_hz: np.ndarray) -> np.ndarray:
        """The fitted S(f) [V^2/Hz]."""
        return oscillator_psd(frequencies_hz, f0_hz=self.f0_hz, q=self.q, a0_v2_per_hz=self.a0_v2_per_hz,
                              white_v2_per_hz=self.white_v2_per_hz, one_over_f_v2=self.one_over_f_v2)

    def normalised_residuals(self) -> np.ndarray:
        """(P/S - 1) * sqrt(averages) in the fit window: unit variance if the model holds."""
        return (self.psd_v2_per_hz / self.model(self.frequencies_hz) - 1.0) * np.sqrt(self.averages)


def _design(f: np.ndarray, p: np.ndarray, with_c: bool) -> tuple[np.ndarray, np.ndarray]:
    """Model and Jacobian in the physical parameters (f0, Q, A0, B[, C])."""
    f0, q, a0, b = p[:4]
    u = f / f0
    one_m = 1.0 - u * u
    lor = 1.0 / (one_m * one_m + (u / q) ** 2)
    peak = a0 * lor
    s = peak + b
    cols = [
        -peak * lor * (4.0 * u * u * one_m - 2.0 * u * u / q**2) / f0,  # dS/df0
        2.0 * peak * lor * u * u / q**3,  # dS/dQ
        lor,  # dS/dA0
        np.ones_like(f),  # dS/dB
    ]
    if with_c:
        s = s + p[4] / f
        cols.append(1.0 / f)
    return s, np.stack(cols, axis=1)


def _neg_log_likelihood(psd: np.ndarray, s: np.ndarray) -> float:
    if not np.all(s > 0):
        return np.inf
    return float(np.sum(psd / s + np.log(s)))


def _maximise_likelihood(f, psd, p0, with_c, *, averages, max_iter=300):
    """Fisher scoring with Levenberg damping on scaled parameters; returns (p, H, iterations, converged)."""
    scale = np.abs(p0) + 0.0
    scale[3] = max(scale[3], np.median(psd) * 1e-3)
    if with_c:
        scale[4] = max(scale[4], scale[3] * p0[0])
    p = p0.copy()
    s, jac = _design(f, p, with_c)
    ell = _neg_log_likelihood(psd, s)
    lam = 1e-3
    converged = False
    for it in range(1, max_iter + 1):
        js = jac * scale
        w = 1.0 / (s * s)
        h = js.T @ (js * w[:, None])
        g = js.T @ ((s - psd) * w)
        d = np.sqrt(np.diag(h))
        d[d == 0] = 1.0
        hn = h / np.outer(d, d)
        gn = g / d
        improved = False
        for _ in range(30):
            try:
                step = -np.linalg.solve(hn + lam * np.eye(hn.shape[0]), gn) / d
            except np.linalg.LinAlgError:
                lam *= 10.0
                continue
            trial = p + step * scale
            if trial[0] <= 0 or trial[1] <= 0:
                lam *= 4.0
                continue
            s_t, jac_t = _design(f, trial, with_c)
            ell_t = _neg_log_likelihood(psd, s_t)
            if ell_t <= ell:
                improved = True
                break
            lam *= 4.0
        if not improved:
            # No step lowers the objective any more: converged if the remaining Newton step is below
            # 1e-3 standard errors (gradient over sqrt(curvature), times sqrt(averages)).
            converged = bool(np.max(np.abs(gn)) * np.sqrt(averages) < 1e-3)
            break
        converged = abs(ell - ell_t) <= 1e-12 * max(1.0, abs(ell)) and np.max(np.abs(step * d)) < 1e-6
        p, s, jac, ell = trial, s_t, jac_t, ell_t
        lam = max(lam / 5.0, 1e-12)
        if converged:
            break
    w = 1.0 / (s * s)
    h_phys = jac.T @ (jac * w[:, None])
    return p, h_phys, it, converged


def fit_thermal_spectrum(frequencies_hz: np.ndarray, psd_v2_per_hz: np.ndarray, *, averages: float,
                         variance_inflation: float = 1.0, f0_guess_hz: float | None = None,
                         fit_range_hz: tuple[float, float] | None = None, background: str = "white+1/f",
                         window_fwhm: float = 10.0, nyquist_hz: float | None = None,
                         spectrum: WelchSpectrum | None = None) -> ThermalFit:
    """Fit the first thermal peak of an averaged one-sided spectrum by maximum likelihood.

    Parameters
    ----------
    frequencies_hz : ndarray
        Equally spaced bin frequencies from 0 (or above) [Hz].
    psd_v2_per_hz : ndarray
        Averaged periodogram [V^2/Hz]; each bin is S(f) times a Gamma(averages, 1/averages) variate.
    averages : float, keyword-only
        Number of averaged periodograms per bin (Welch segments).
    variance_inflation : float
        Factor applied to the Fisher covariance for correlated bins (1 for independent bins; see
        :func:`.spectra.welch_variance_inflation`).
    f0_guess_hz : float, optional
        Skip the automatic peak search and start here [Hz].
    fit_range_hz : (float, float), optional
        Fit window [Hz]; default: the peak +- ``window_fwhm`` full widths at half maximum.
    background : {"white+1/f", "white"}
        Background terms fitted besides the oscillator.
    window_fwhm : float
        Half-width of the automatic fit window in full widths at half maximum.
    nyquist_hz : float, optional
        Nyquist frequency [Hz] for the check that the peak lies well below it; default from ``spectrum``,
        no check without either.
    spectrum : WelchSpectrum, optional
        Kept in the result for plotting.

    Returns
    -------
    ThermalFit

    Raises
    ------
    ThermalFitError
        Empty, non-finite or zero spectrum; no peak standing out of the background; peak too close to the
        Nyquist frequency; fit not converged.
    """
    f = np.asarray(frequencies_hz, dtype=float)
    p = np.asarray(psd_v2_per_hz, dtype=float)
    if background not in ("white+1/f", "white"):
        raise ThermalFitError(f"background = {background!r}; allowed: 'white+1/f', 'white'")
    if f.ndim != 1 or f.shape != p.shape or f.size < 16:
        raise ThermalFitError(f"spectrum needs matching 1-D arrays of >= 16 bins, got {f.shape} and {p.shape}")
    if not (np.all(np.isfinite(p)) and np.all(np.isfinite(f))):
        raise ThermalFitError("spectrum contains non-finite values (NaN or infinity)")
    if not np.max(p) > 0:
        raise ThermalFitError("spectrum is identically zero: the record is constant")
    if averages < 1:
        raise ThermalFitError(f"averages = {averages!r} must be >= 1")
    with_c = background == "white+1/f"
    df = float(f[1] - f[0])
    if nyquist_hz is None and spectrum is not None:
        nyquist_hz = spectrum.rate_hz / 2.0
    if fit_range_hz is not None:
        lo, hi = fit_range_hz
        if not lo < hi:
            raise ThermalFitError(f"fit_range_hz = {fit_range_hz!r} must be (low, high) with low < high")
        inside = (f >= lo) & (f <= hi)
        peak = _find_peak(f[inside], p[inside], averages=averages, f0_guess_hz=f0_guess_hz)
    else:
        peak = _find_peak(f, p, averages=averages, f0_guess_hz=f0_guess_hz)
    if nyquist_hz is not None and peak.f0_hz > _MAX_F0_OVER_NYQUIST * nyquist_hz:
        raise ThermalFitError(
            f"resonance near {peak.f0_hz:.6g} Hz is too close to the Nyquist frequency {nyquist_hz:.6g} Hz "
            f"(limit {_MAX_F0_OVER_NYQUIST} of it): sample faster")
    f0, fwhm, q = peak.f0_hz, peak.fwhm_hz, peak.f0_hz / peak.fwhm_hz
    p0 = np.array([f0, q, max(peak.height_v2_per_hz - peak.background_v2_per_hz, 0) / q**2,
                   peak.background_v2_per_hz, 0.0])
    if not with_c:
        p0 = p0[:4]
    for _pass in range(2):  # second pass re-centres the window on the fitted peak
        if fit_range_hz is not None:
            lo, hi = fit_range_hz
        else:
            half = max(window_fwhm * fwhm, 20 * df)
            lo, hi = max(f0 - half, 3 * df), min(f0 + half, f[-1] - df)
        sel = (f >= lo) & (f <= hi) & (f > 0)
        if np.count_nonzero(sel) < 3 * p0.size:
            raise ThermalFitError(
                f"fit window {lo:.6g}..{hi:.6g} Hz holds {np.count_nonzero(sel)} bins, need >= {3 * p0.size}")
        fw, pw = f[sel], p[sel]
        est, h, iterations, converged = _maximise_likelihood(fw, pw, p0, with_c, averages=averages)
        if fit_range_hz is not None:
            break
        f0_new, fwhm_new = est[0], est[0] / est[1]
        if abs(f0_new - f0) < 0.1 * fwhm and abs(fwhm_new / fwhm - 1) < 0.2:
            break
        f0, fwhm, p0 = f0_new, fwhm_new, est
    if not converged:
        raise ThermalFitError(f"maximum-likelihood fit did not converge in {iterations} iterations")
    try:
        cov = np.linalg.inv(h) * (variance_inflation / averages)
    except np.linalg.LinAlgError as exc:
        raise ThermalFitError("Fisher matrix is singular: the fit window does not determine the peak") from exc
    names = ("f0_hz", "q", "a0_v2_per_hz", "white_v2_per_hz") + (("one_over_f_v2",) if with_c else ())
    fit = ThermalFit(
        f0_hz=float(est[0]), q=float(est[1]), a0_v2_per_hz=float(est[2]), white_v2_per_hz=float(est[3]),
        one_over_f_v2=float(est[4]) if with_c else 0.0, covariance=cov, parameter_names=names,
        fit_range_hz=(float(fw[0]), float(fw[-1])), frequencies_hz=fw, psd_v2_per_hz=pw,
        averages=float(averages), variance_inflation=float(variance_inflation), iterations=iterations,
        warnings=(), spectrum=spectrum)
    return _checked(fit, df)


def _checked(fit: ThermalFit, df: float) -> ThermalFit:
    lo, hi = fit.fit_range_hz
    if not (lo < fit.f0_hz < hi) or not np.all(np.isfinite(np.diag(fit.covariance))):
        raise ThermalFitError(
            f"no resonance peak stands out of the background: fitted f0 = {fit.f0_hz:.6g} Hz outside the "
            f"fit window {lo:.6g}..{hi:.6g} Hz or undetermined")
    significance = fit.peak_area_v2 / fit.peak_area_std_v2 if fit.peak_area_std_v2 > 0 else 0.0
    if not significance >= _MIN_SIGNIFICANCE:
        raise ThermalFitError(
            f"no resonance peak stands out of the background: peak area {fit.peak_area_v2:.4g} V^2 is "
            f"{significance:.3g} standard errors from zero (need >= {_MIN_SIGNIFICANCE})")
    notes = []
    bins = fit.f0_hz / fit.q / df
    if bins < _MIN_BINS_PER_FWHM:
        notes.append(f"peak resolved by only {bins:.3g} bins per FWHM (want >= {_MIN_BINS_PER_FWHM}): "
                     "Q and k may be biased; use longer segments")
    if fit.q < 2:
        notes.append(f"Q = {fit.q:.3g} is low: the oscillator model and the window may not hold")
    return replace(fit, warnings=tuple(notes))
