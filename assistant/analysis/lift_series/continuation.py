"""What every Laplace continuation of a lift series returns, and the resolution it reaches.

Above the film every spatial Fourier component of the stray field, and so of the force gradient on a
point-probe tip (monopole or dipole, any finite oscillation amplitude), decays as ``exp(-|q| z)`` (Laplace's
equation; Hug et al. 1998, J. Appl. Phys. 83, 5609; Wallace 1951, Bell Syst. Tech. J. 30, 1145; from memory).
The estimators fit one amplitude per spatial frequency jointly across the heights and differ in how they
treat the scan's edges: :mod:`.periodic` (one period of the field), :mod:`.reflected` (the scan reflected at
its edges) and :mod:`.windowed` (a window onto a larger field). All work in a *signal* unit chosen by the
caller: the force gradient [N/m] when k and Q are known, otherwise the phase [deg] itself.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .frequencies import dct_frequencies, rfft_wavenumbers

__all__ = ["ContinuationFit", "resolution_period_m"]


@dataclass(frozen=True)
class ContinuationFit:
    """Result of a continuation fit (signal units s of the caller; N = rows * cols).

    Attributes
    ----------
    amplitude : ndarray, complex (rows, cols//2+1)
        Fitted rfft2 coefficients A(q) at the first height.
    model : ndarray (H, rows, cols)
        Fitted (denoised) magnetic image at every height [s].
    residual : ndarray (H, rows, cols)
        Data minus model; NaN where the data were masked [s].
    noise_std : ndarray (H,)
        Per-pixel white-noise std of each height from the leverage-corrected residual [s].
    magnetic_rms, magnetic_rms_std : ndarray (H,)
        Noise-debiased rms of the magnetic image at each height and its standard error [s].
    residual_rms : ndarray (H,)
        Rms of the residual over valid pixels [s].
    expected_residual_rms : ndarray (H,)
        Rms the residual would have if it were pure noise of ``noise_std`` [s].
    inverse_weight_sum : ndarray (rows, cols//2+1)
        ``1 / sum_h w_h e_h^2``: Var(A(q)) = N * this (``grid="dct"``: Var(A(q)) itself, cells (rows, cols)).
    decay : ndarray (H, rows, cols//2+1)
        ``exp(-|q| (h - h_0))``.
    noise_power : ndarray (H,)
        Mean-square the fit noise adds to ``model`` at each height [s^2] (subtract it from the map's
        mean square to debias).
    heights_m : ndarray (H,)
    pixel_m : (float, float)
        Row and column spacing [m].
    """

    amplitude: np.ndarray
    model: np.ndarray
    residual: np.ndarray
    noise_std: np.ndarray
    magnetic_rms: np.ndarray
    magnetic_rms_std: np.ndarray
    residual_rms: np.ndarray
    expected_residual_rms: np.ndarray
    inverse_weight_sum: np.ndarray
    decay: np.ndarray
    noise_power: np.ndarray
    heights_m: np.ndarray
    pixel_m: tuple[float, float]
    window_mean: np.ndarray | None = None   # (H,) window mean of ``model`` (windowed fit only) [s]
    iterations: int = 0                     # conjugate-gradient iterations (windowed fit only)
    drift_px: np.ndarray | None = None      # (J, 2) drift refined with the field (windowed fit only) [px]
    solution: np.ndarray | None = None      # (K, R, C) the padded field solved for (windowed fit only) [s]
    grid: str = "rfft"                      # cells of amplitude/decay: "rfft" half plane or "dct" (orthonormal)
    unit_residual_rms: np.ndarray | None = None  # (H,) residual rms that white noise of unit variance at


def resolution_period_m(fit: ContinuationFit, *, snr: float = 1.0, significance: float = 3.0,
                        noise_std: np.ndarray | None = None) -> np.ndarray:
    """Shortest spatial period whose fitted magnetic contrast is still above the noise, per height [m].

    Radial bins of width 1 / (the longer side of the scan); a bin passes at height h if its noise-debiased fitted
    power exceeds ``snr`` times the measurement-noise power of that height in the same bin and is
    ``significance`` standard errors above zero. The period is 1 / (highest passing frequency); inf where
    no bin passes. ``noise_std`` (H,) overrides the per-pixel noise of one image at each height (default: the
    fitted ``fit.noise_std``). Common practice (signal-to-noise of one), no source.
    """
    sig_n = fit.noise_std if noise_std is None else np.asarray(noise_std, float)
    nh = fit.model.shape[0]
    rows, cols = fit.model.shape[-2:]
    n = rows * cols
    if fit.grid == "dct":  # orthonormal cells: white noise of variance s^2 has s^2 in every cell
        fr, fc = dct_frequencies((rows, cols), fit.pixel_m)
        fmag, cw, nu = np.hypot(fr, fc), np.ones((rows, cols)), 1.0
    else:
        _, fmag, cw = rfft_wavenumbers((rows, cols), fit.pixel_m)
        nu = float(n)
    df = 1.0 / max(rows * fit.pixel_m[0], cols * fit.pixel_m[1])
    b = np.rint(fmag / df).astype(int).ravel()
    nb = b.max() + 1
    pred = fit.amplitude[None] * fit.decay
    v = nu * fit.decay**2 * fit.inverse_weight_sum[None]
    p2 = np.abs(pred) ** 2
    mu2 = np.clip(p2 - v, 0.0, None)
    out = np.full(nh, np.inf)
    cwf = cw.ravel()
    for i in range(nh):  # over heights; bins are vectorised
        sig = np.bincount(b, weights=cwf * (p2[i] - v[i]).ravel(), minlength=nb)
        var = np.bincount(b, weights=2.0 * cwf * (2.0 * mu2[i] * v[i] + v[i] ** 2).ravel(), minlength=nb)
        noise = np.bincount(b, weights=cwf * nu * sig_n[i] ** 2, minlength=nb)
        ok = (sig >= snr * noise) & (sig > significance * np.sqrt(var))
        ok[0] = False
        idx = np.nonzero(ok)[0]
        if idx.size:
            out[i] = 1.0 / (idx.max() * df)
    return out
