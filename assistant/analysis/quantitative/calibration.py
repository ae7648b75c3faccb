"""Tip calibration as a whole: the TTF from a reference image, its point-probe fit, and an honest ring uncertainty.

:func:`calibrate_tip` runs :func:`transfer.calibrate_transfer` and :func:`point_probe.fit_point_probe` and adds
what the field reconstruction needs: a TTF corrected for the estimator's own bias and a per-ring uncertainty that
covers more than the noise.

* **Bias by parametric bootstrap** (Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 10, from
  memory): a replica image is made from the estimated pattern (its level set on a grid twice as fine, so walls
  fall inside pixels as on the film) and the estimated TTF, with noise of the measured level, and calibrated in
  the same way. Its TTF over the one that made it is the estimator's ring-by-ring bias for this kind of image
  (the window and the pattern's weak long periods bend the profile by a few per cent near the band's long end;
  measured on synthetic mazes, the replica reproduced those errors to about 1 %). The bias, smoothed over
  neighbouring rings, is divided out.
* **Uncertainty**: each ring's noise error, the replica's ring-to-ring scatter about its smoothed bias, and the
  profile's relative scatter about the smooth point-probe curve as a floor; the lag-one correlation of that
  scatter is kept so that the field map's Monte Carlo perturbs the TTF by deviations of that smoothness (an AR(1)
  picture; common practice, no source). A point-probe curve that does not fit the tip raises the floor, so the
  rule errs on the safe side.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from assistant.analysis.quantitative.point_probe import PointProbeFit, fit_point_probe, point_probe_ttf
from assistant.analysis.quantitative.transfer import TransferEstimate, calibrate_transfer
from assistant.errors import InputError

__all__ = ["TipCalibration", "calibrate_tip"]

# the film model's residual, in units of the image noise, above which the image holds more than the film's
# domains seen through a point-like tip (clean references leave 1.5-2; rule of thumb, no source)
FILM_MISFIT = 4.0


@dataclass(frozen=True)
class TipCalibration:
    """A calibrated tip: the TTF profile with its band and uncertainty, the point-probe fit and the inputs.

    ``ttf_n_per_a`` is NaN outside the valid band; ``ttf_unc_n_per_a`` is the uncertainty the field map uses
    (noise and the floor of the module docstring); ``ring_correlation`` the lag-one correlation of its errors.
    """

    transfer: TransferEstimate
    point_probe: PointProbeFit | None
    point_probe_error: str | None
    ttf_n_per_a: np.ndarray
    ttf_unc_n_per_a: np.ndarray
    ring_correlation: float
    scatter_rel: float
    bias_rel: np.ndarray             # the bias divided out, per ring (0 outside the band)
    ms_a_per_m: float
    ms_std_a_per_m: float
    thickness_m: float
    thickness_std_m: float
    plane_m: float
    amplitude_m: float | None
    tip_moment: str
    plane_std_m: float = 0.0         # standard uncertainty of the measurement plane (in the offset's uncertainty)

    @property
    def band_periods_m(self) -> tuple[float, float]:
        return self.transfer.band_periods_m

    @property
    def warnings(self) -> tuple[str, ...]:
        """What makes this calibration doubtful (a film model that leaves more than noise)."""
        r = self.transfer.residual_rms
        kept = min(r) if r else None  # the pattern kept is the round with the smallest residual, not the last one
        if kept is not None and kept > FILM_MISFIT:
            return (f"the reference film's model leaves a residual of {kept:.1f} × the noise: the image holds "
                    "more than the film's domains (a background beyond a plane, another Ms or thickness, a film "
                    "that is not perpendicular, a tip that changed, or pixels too coarse for its smallest domains: "
                    "image it with smaller ones); the TTF and the point-probe fit are doubtful",)
        return ()

    def to_dict(self) -> dict:
        """The numbers of ``mfma analyze tip --json`` (nm, A m^2, A m; tip file added by the caller)."""
        pp = self.point_probe

        def opt(v, scale=1.0):
            return None if v is None else v * scale
        t = self.transfer
        return {
            "band_nm": [p * 1e9 for p in self.band_periods_m],
            "regularization": t.alpha_relative,
            "regularization_criterion": "GCV (generalised cross-validation)",
            "dipole_a_m2": opt(pp and pp.moment_a_m2), "dipole_std_a_m2": opt(pp and pp.moment_std_a_m2),
            "monopole_a_m": opt(pp and pp.monopole_a_m), "monopole_std_a_m": opt(pp and pp.monopole_std_a_m),
            "offset_nm": opt(pp and pp.offset_m, 1e9), "offset_std_nm": opt(pp and pp.offset_std_m, 1e9),
            "point_probe_determined": bool(pp and pp.determined and not self.warnings),
            "point_probe_model": pp.preferred if pp else None,
            "point_probe_verdict": (("not trusted, the film model does not fit: " if self.warnings else "")
                                    + pp.verdict) if pp else self.point_probe_error,
            "warnings": list(self.warnings),
            "measurement_plane_nm": self.plane_m * 1e9, "plane_std_nm": self.plane_std_m * 1e9,
            "tip_moment": self.tip_moment,
            "amplitude_nm": opt(self.amplitude_m, 1e9), "ms_ka_per_m": self.ms_a_per_m / 1e3,
            "ms_std_ka_per_m": self.ms_std_a_per_m / 1e3, "thickness_nm": self.thickness_m * 1e9,
            "thickness_std_nm": self.thickness_std_m * 1e9, "noise_n_per_m": t.noise_n_per_m,
            "refinement_rounds": t.rounds, "residual_rms_per_noise": list(t.residual_rms),
            "ttf_scatter_rel": self.scatter_rel, "ring_correlation": self.ring_correlation,
        }


def calibrate_tip(gradient_n_per_m: np.ndarray, *, pixel_m: float | tuple[float, float], ms_a_per_m: float,
                  thickness_m: float, plane_m: float, ms_std_a_per_m: float | None = None,
                  thickness_std_m: float | None = None, tip_moment: str = "up", amplitude_m: float | None = None,
                  periodic: bool = False, refine: bool = True, bootstrap: bool = True,
                  seed: int = 0, plane_std_m: float = 0.0) -> TipCalibration:
    """Calibrate the tip on a force-gradient image of a perpendicular reference film.

    Parameters
    ----------
    gradient_n_per_m : (rows, cols) F' [N/m] at the measurement plane.
    pixel_m : pixel spacing [m], one value or (row, column).
    ms_a_per_m, thickness_m : the reference's Ms [A/m] and t [m].
    plane_m : measurement plane above the reference's surface [m] (closest approach of the tip).
    ms_std_a_per_m, thickness_std_m : their standard uncertainties (default 5 % of each; common practice for a
        reference film whose Ms and t come from magnetometry and X-ray reflectivity, no source).
    tip_moment : ``"up"`` or ``"down"`` (see ``transfer.calibrate_transfer``).
    amplitude_m : peak oscillation amplitude [m] if known; the point-probe model then includes it.
    periodic, refine : see ``transfer.calibrate_transfer``.
    bootstrap : correct the estimator's bias with a replica (module docstring); ``seed`` seeds its noise.
    plane_std_m : standard uncertainty of ``plane_m`` [m]. The film's field is computed at ``plane_m``, so the
        point-probe offset delta is counted from it and takes its uncertainty as well (delta moves one for one
        with the plane); a field map carries it on (``field.reconstruct_field``).
    """
    ms_std = 0.05 * ms_a_per_m if ms_std_a_per_m is None else float(ms_std_a_per_m)
    t_std = 0.05 * thickness_m if thickness_std_m is None else float(thickness_std_m)
    if ms_std < 0 or t_std < 0 or not (plane_std_m >= 0):
        raise InputError("the uncertainties of Ms, t and the measurement plane must be >= 0")
    est = calibrate_transfer(gradient_n_per_m, pixel_m=pixel_m, ms_a_per_m=ms_a_per_m, thickness_m=thickness_m,
                             height_m=plane_m, tip_moment=tip_moment, periodic=periodic, refine=refine)
    band = est.in_band
    k = est.k_per_m[band]

    def fit(values: np.ndarray, stds: np.ndarray) -> tuple[PointProbeFit | None, str | None]:
        try:
            return fit_point_probe(k, values, stds, amplitude_m=amplitude_m, ms_rel_std=ms_std / ms_a_per_m,
                                   thickness_m=thickness_m, thickness_std_m=t_std), None
        except (ValueError, np.linalg.LinAlgError) as exc:
            return None, f"point-probe fit failed: {exc}"

    pp, _ = fit(est.ttf_n_per_a[band], est.ttf_std_n_per_a[band])
    bias, replica_scatter = np.zeros(k.size), 0.0
    if bootstrap:
        bias, replica_scatter = _replica_bias(est, pp, pixel_m=pixel_m, ms=ms_a_per_m, t=thickness_m, z=plane_m,
                                              tip_moment=tip_moment, amplitude_m=amplitude_m, periodic=periodic,
                                              refine=refine, rng=np.random.default_rng(seed))
    values = est.ttf_n_per_a[band] / (1.0 + bias)
    rel_std = np.abs(est.ttf_std_n_per_a[band] / est.ttf_n_per_a[band])
    pp, pp_error = fit(values, np.abs(values) * rel_std)
    scatter, rho, local = 0.0, 0.0, np.zeros(k.size)
    if pp is not None:
        smooth = point_probe_ttf(k, moment_a_m2=pp.moment_a_m2, monopole_a_m=pp.monopole_a_m, offset_m=pp.offset_m,
                                 amplitude_m=amplitude_m)
        r = values / smooth - 1.0
        # ring-to-ring scatter by the difference-based estimator of Gasser, Sroka & Jennen-Steinmetz 1986
        # (Biometrika 73, 625; from memory): second differences cancel a smooth misfit of the point-probe curve
        # (which for a tip that is not a point probe is its real shape, not an error)
        # (which for a tip that is not a point probe is its real shape, not an error); local, over nine rings,
        # because the errors grow towards the band's ends
        second = np.zeros_like(r)
        if r.size > 2:
            second[1:-1] = 0.5 * (r[:-2] + r[2:]) - r[1:-1]
            second[0], second[-1] = second[1], second[-2]
        from scipy.ndimage import uniform_filter1d

        local = np.sqrt(uniform_filter1d(second * second / 1.5, size=9, mode="nearest"))
        scatter = float(np.sqrt(np.mean(second * second) / 1.5))
        c = r - r.mean()
        denom = float(np.sum(c * c))
        rho = float(np.clip(np.sum(c[1:] * c[:-1]) / denom, 0.0, 0.95)) if denom > 0 and r.size > 2 else 0.0
    rel = np.maximum(np.hypot(rel_std, replica_scatter), local if pp is not None else 0.0)
    ttf = np.full(est.k_per_m.shape, np.nan)
    unc = np.full(est.k_per_m.shape, np.nan)
    ttf[band] = values
    unc[band] = np.abs(values) * rel
    full_bias = np.zeros(est.k_per_m.shape)
    full_bias[band] = bias
    if pp is not None and plane_std_m and pp.offset_std_m is not None:
        pp = dataclasses.replace(pp, offset_std_m=float(np.hypot(pp.offset_std_m, plane_std_m)))
    return TipCalibration(transfer=est, point_probe=pp, point_probe_error=pp_error, ttf_n_per_a=ttf,
                          ttf_unc_n_per_a=unc, ring_correlation=rho, scatter_rel=scatter, bias_rel=full_bias,
                          ms_a_per_m=ms_a_per_m,
                          ms_std_a_per_m=ms_std, thickness_m=thickness_m, thickness_std_m=t_std, plane_m=plane_m,
                          amplitude_m=amplitude_m, tip_moment=tip_moment, plane_std_m=float(plane_std_m))


def _replica_bias(est: TransferEstimate, pp: PointProbeFit | None, *, pixel_m, ms: float, t: float, z: float,
                  tip_moment: str, amplitude_m: float | None, periodic: bool, refine: bool,
                  rng: np.random.Generator) -> tuple[np.ndarray, float]:
    """Smoothed relative bias per band ring and the replica's ring-to-ring scatter about it (module docstring)."""
    from scipy import ndimage

    from assistant.analysis.quantitative import fourier as fr
    from assistant.analysis.quantitative.reference import film_factor
    from assistant.analysis.quantitative.transfer import CalibrationInputError

    os_ = 2
    dy, dx = fr.pixel_pair(pixel_m)
    sign = 1.0 if tip_moment == "up" else -1.0
    fine = ndimage.zoom(est.pattern, os_, order=3, mode="mirror", grid_mode=True)
    fine = np.where(fine >= 0.0, 1.0, -1.0)
    shape = fine.shape
    ky = 2.0 * np.pi * np.fft.fftfreq(shape[0], d=dy / os_)[:, None]
    kx = 2.0 * np.pi * np.fft.rfftfreq(shape[1], d=dx / os_)[None, :]
    k = np.hypot(ky, kx)
    band = est.in_band
    ttf = np.interp(k, est.k_per_m[band], est.ttf_n_per_a[band])
    k_hi = float(est.k_per_m[band].max())
    if pp is not None:   # beyond the band: the point-probe curve, scaled to meet the profile at the band's end
        curve = point_probe_ttf(k, moment_a_m2=pp.moment_a_m2, monopole_a_m=pp.monopole_a_m, offset_m=pp.offset_m,
                                amplitude_m=amplitude_m)
        edge = point_probe_ttf(np.array([k_hi]), moment_a_m2=pp.moment_a_m2, monopole_a_m=pp.monopole_a_m,
                               offset_m=pp.offset_m, amplitude_m=amplitude_m)[0]
        outside = curve * (ttf[k >= k_hi].flat[0] / edge if edge else 1.0)
    else:
        outside = ttf * np.exp(-(k - k_hi) * z)
    ttf = np.where(k > k_hi, outside, ttf)
    sinc = np.sinc(np.fft.fftfreq(shape[0]))[:, None] * np.sinc(np.fft.rfftfreq(shape[1]))[None, :]
    spec = np.fft.rfft2(sign * fine) * sinc * film_factor(k, ms_a_per_m=ms, thickness_m=t, height_m=z) * ttf
    spec[0, 0] = 0.0
    # the image's pixel centres sit between two fine cells: shift the fine grid by half a fine cell, then sample
    image = np.fft.irfft2(spec * np.exp(0.5j * (ky * dy + kx * dx) / os_), s=shape)[0::os_, 0::os_]
    image = image + est.noise_n_per_m * rng.standard_normal(image.shape)
    try:
        rep = calibrate_transfer(image, pixel_m=(dy, dx), ms_a_per_m=ms, thickness_m=t, height_m=z,
                                 tip_moment=tip_moment, periodic=periodic, refine=refine)
    except CalibrationInputError:
        return np.zeros(int(band.sum())), 0.0
    raw = np.where(np.isfinite(rep.ttf_n_per_a[band]), rep.ttf_n_per_a[band] / est.ttf_n_per_a[band] - 1.0, 0.0)
    smooth = ndimage.gaussian_filter1d(raw, 1.5, mode="nearest")
    return smooth, float(np.sqrt(np.mean((raw - smooth) ** 2)))
