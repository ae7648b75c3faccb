"""Drive-sweep fit of the driven damped oscillator, and the operating point chosen from it.

Model (steady state of m z'' + (m w0/Q) z' + m w0^2 z = F cos(w t), textbook), u = f/f0::

    A(f)    = A_res / (Q sqrt((1 - u^2)^2 + (u/Q)^2))        (A_res = amplitude at f = f0)
    lag(f)  = atan2(u/Q, 1 - u^2)                             (response behind drive, 0..180 deg)
    phi(f)  = phase_offset - (lag - 90 deg)                   (reported lock-in phase, deg)

**Phase convention:** the fitted phase is the lock-in phase as the instruments here report it,
``-(lag - 90 deg) + offset``: it falls through ``offset`` at resonance, is ``offset + 90 deg`` far below
and ``offset - 90 deg`` far above. Residuals are wrapped to (-180, 180] deg, so any offset is accepted.
Amplitude and phase are fitted jointly by weighted least squares; uncertainties from the Jacobian at the
optimum. The lock-in's noise is complex: the detector's white part (the same at every frequency) and the thermal
force noise, which passes through the lever's response and so grows with |H(f)|. The amplitude's variance is
therefore a + b A(f)^2 and the phase's a' + b' (A_res/A(f))^2 (the white part is a phase noise of sigma/A); each
channel's two terms are estimated from the squared residuals of the previous pass (non-negative least squares)
and the fit is repeated with those weights. One constant weight per channel made the uncertainties of f0 and Q
about half the scatter when the thermal part dominates.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from assistant.errors import AssistantError, InputError

__all__ = [
    "QComparison", "SweepFitError", "SweepResult", "compare_q", "drive_amplitude_for_free_amplitude",
    "drive_frequency", "fit_drive_sweep", "oscillator_response", "setpoint_from_ratio",
    "sweep_response_v_per_v",
]


class SweepFitError(AssistantError, ValueError):
    """The sweep cannot be fitted (the message names the quantity and the limit)."""


def oscillator_response(frequencies_hz, *, f0_hz: float, q: float, amplitude_at_resonance_v: float,
                        phase_offset_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """Model amplitude [V] and lock-in phase [deg] of the driven damped oscillator (module docstring)."""
    u = np.asarray(frequencies_hz, dtype=float) / f0_hz
    amp = amplitude_at_resonance_v / (q * np.sqrt((1 - u * u) ** 2 + (u / q) ** 2))
    lag_deg = np.degrees(np.arctan2(u / q, 1 - u * u))
    return amp, phase_offset_deg - (lag_deg - 90.0)


def _wrap_deg(x):
    return (np.asarray(x) + 180.0) % 360.0 - 180.0


@dataclass(frozen=True, eq=False)
class SweepResult:
    """Fitted sweep (SI, phase in degrees); the data are kept for plotting."""

    f0_hz: float
    f0_std_hz: float
    q: float
    q_std: float
    phase_offset_deg: float
    phase_offset_std_deg: float
    amplitude_at_resonance_v: float
    amplitude_at_resonance_std_v: float
    amplitude_noise_v: float  # rms over the sweep of each point's fitted noise (module docstring)
    phase_noise_deg: float
    frequencies_hz: np.ndarray
    amplitude_v: np.ndarray
    phase_deg: np.ndarray

    def model(self, frequencies_hz) -> tuple[np.ndarray, np.ndarray]:
        """Fitted amplitude [V] and phase [deg] at these frequencies."""
        return oscillator_response(frequencies_hz, f0_hz=self.f0_hz, q=self.q,
                                   amplitude_at_resonance_v=self.amplitude_at_resonance_v,
                                   phase_offset_deg=self.phase_offset_deg)

    def to_dict(self) -> dict[str, float]:
        return {
            "f0_hz": float(self.f0_hz), "f0_std_hz": float(self.f0_std_hz), "q": float(self.q),
            "q_std": float(self.q_std), "phase_offset_deg": float(self.phase_offset_deg),
            "amplitude_at_resonance_v": float(self.amplitude_at_resonance_v),
        }


def fit_drive_sweep(frequencies_hz: np.ndarray, amplitude_v: np.ndarray, phase_deg: np.ndarray) -> SweepResult:
    """Fit f0, Q, phase offset and amplitude at resonance to a drive sweep.

    Parameters
    ----------
    frequencies_hz : ndarray
        Drive frequencies [Hz], covering the resonance.
    amplitude_v : ndarray
        Oscillation amplitude [V] (detector volts) at each frequency.
    phase_deg : ndarray
        Lock-in phase [deg] in the convention of the module docstring.

    Returns
    -------
    SweepResult

    Raises
    ------
    SweepFitError
        Mismatched, too few or non-finite data; no resonance inside the sweep; fit not converged.
    """
    f = np.asarray(frequencies_hz, dtype=float)
    a = np.asarray(amplitude_v, dtype=float)
    ph = np.asarray(phase_deg, dtype=float)
    if not (f.ndim == 1 and f.shape == a.shape == ph.shape):
        raise SweepFitError(f"sweep arrays must be 1-D and of one length, got {f.shape}, {a.shape}, {ph.shape}")
    if f.size < 8:
        raise SweepFitError(f"sweep has {f.size} points, need >= 8")
    if not (np.all(np.isfinite(f)) and np.all(np.isfinite(a)) and np.all(np.isfinite(ph))):
        raise SweepFitError("sweep contains non-finite values (NaN or infinity)")
    order = np.argsort(f)
    f, a, ph = f[order], a[order], ph[order]
    if not np.ptp(a) > 0:
        raise SweepFitError("amplitude is constant over the sweep: no resonance")
    i = int(np.argmax(a))
    if i in (0, f.size - 1):
        raise SweepFitError(
            f"largest amplitude at the sweep edge ({f[i]:.6g} Hz): the resonance is not inside "
            f"{f[0]:.6g}..{f[-1]:.6g} Hz")
    above = np.flatnonzero(a >= a[i] / np.sqrt(2))
    fwhm = max(f[min(above[-1] + 1, f.size - 1)] - f[max(above[0] - 1, 0)], f[i + 1] - f[i - 1]) * 0.8
    x0 = np.array([f[i], max(f[i] / fwhm, 0.6), a[i], ph[i]])
    scale = np.array([f[i], x0[1], a[i], 1.0])

    def variance_model(r, g):
        # r^2 ~ a + b g with a, b >= 0 (E r^2 is the variance, its scatter ~ the variance itself, so the
        # least squares is reweighted by the variance found); corrected for the 4 fitted parameters
        design, var = np.stack((np.ones_like(g), g), axis=1), np.ones_like(g)
        for _ in range(4):
            w = 1.0 / var
            coef = scipy.optimize.nnls(design * w[:, None], r * r * w)[0]
            var = np.maximum(coef[0] + coef[1] * g, 1e-30 * np.max(r * r) + 1e-300)
        return np.sqrt(var * f.size / max(f.size - 2, 1))

    def residuals(x, sa, sp):
        p = x * scale
        ma, mp = oscillator_response(f, f0_hz=p[0], q=p[1], amplitude_at_resonance_v=p[2], phase_offset_deg=p[3])
        return np.concatenate(((ma - a) / sa, _wrap_deg(mp - ph) / sp))

    import scipy.optimize  # here: it takes 0.2-0.3 s to load, and reading a stored sweep does not fit

    sa, sp = np.full(f.size, 0.01 * a[i]), np.ones(f.size)
    x = x0 / scale
    for _ in range(5):  # reweight each channel by its residuals' variance model (module docstring), then refit
        sol = scipy.optimize.least_squares(residuals, x, args=(sa, sp), method="lm", x_scale="jac")
        if not sol.success:
            raise SweepFitError(f"sweep fit did not converge: {sol.message}")
        x = sol.x
        r = residuals(x, 1.0, 1.0)
        model_a = oscillator_response(f, f0_hz=x[0] * scale[0], q=x[1] * scale[1],
                                      amplitude_at_resonance_v=x[2] * scale[2], phase_offset_deg=0.0)[0]
        g = (model_a / np.max(np.abs(model_a))) ** 2
        sa_new = np.maximum(variance_model(r[: f.size], g), 1e-12 * a[i])
        sp_new = np.maximum(variance_model(r[f.size:], 1.0 / g), 1e-9)
        done = np.max(np.abs(sa_new / sa - 1)) < 0.01 and np.max(np.abs(sp_new / sp - 1)) < 0.01
        sa, sp = sa_new, sp_new
        if done:
            break
    sol = scipy.optimize.least_squares(residuals, x, args=(sa, sp), method="lm", x_scale="jac")
    p = sol.x * scale
    jac = sol.jac
    chi2 = float(np.sum(sol.fun**2)) / max(2 * f.size - 4, 1)
    try:
        cov = np.linalg.inv(jac.T @ jac) * chi2 * np.outer(scale, scale)
    except np.linalg.LinAlgError as exc:
        raise SweepFitError("sweep does not determine f0, Q, offset and amplitude (singular Jacobian)") from exc
    std = np.sqrt(np.diag(cov))
    if not (f[0] < p[0] < f[-1]) or p[1] <= 0:
        raise SweepFitError(f"fitted resonance f0 = {p[0]:.6g} Hz, Q = {p[1]:.4g} outside the sweep "
                            f"{f[0]:.6g}..{f[-1]:.6g} Hz")
    return SweepResult(
        f0_hz=float(p[0]), f0_std_hz=float(std[0]), q=float(p[1]), q_std=float(std[1]),
        phase_offset_deg=float(_wrap_deg(p[3])), phase_offset_std_deg=float(std[3]),
        amplitude_at_resonance_v=float(abs(p[2])), amplitude_at_resonance_std_v=float(std[2]),
        amplitude_noise_v=float(np.sqrt(np.mean(sa**2))), phase_noise_deg=float(np.sqrt(np.mean(sp**2))),
        frequencies_hz=f, amplitude_v=a, phase_deg=ph)


def drive_frequency(sweep: SweepResult, *, side: str = "resonance") -> float:
    """Drive frequency [Hz] for imaging.

    ``"resonance"``: the free resonance f0, where the phase responds most to a force gradient (phase
    detection at fixed drive). ``"below"``/``"above"``: the points of steepest amplitude slope for slope
    detection, f0 (1 -+ 1/(2 sqrt(2) Q)), from the Lorentzian approximation of A(f) near f0 (derived here;
    slope detection as in Martin, Williams & Wickramasinghe 1987, J. Appl. Phys. 61, 4723).
    """
    if side == "resonance":
        return sweep.f0_hz
    if side not in ("below", "above"):
        raise InputError(f"side = {side!r}; allowed: 'resonance', 'below', 'above'")
    sign = -1.0 if side == "below" else 1.0
    return sweep.f0_hz * (1.0 + sign / (2.0 * np.sqrt(2.0) * sweep.q))


def drive_amplitude_for_free_amplitude(free_amplitude_m: float, *, invols_m_per_v: float,
                                       response_v_per_v: float, max_drive_v: float | None = None) -> float:
    """Drive amplitude [V] giving a requested free oscillation amplitude.

    Parameters
    ----------
    free_amplitude_m : float
        Wanted free amplitude [m] (same convention, peak or rms, as the measured amplitude).
    invols_m_per_v : float, keyword-only
        Sensitivity converting detector volts to tip displacement [m/V] (for an oscillating lever the
        dynamic one, 1.09 x the static InvOLS, Butt & Jaschke 1995).
    response_v_per_v : float
        Measured detector amplitude per volt of drive at the drive frequency [V/V] (linear response).
    max_drive_v : float, optional
        Limit of the drive output [V]; exceeding it raises ValueError.
    """
    for name, value in (("free_amplitude_m", free_amplitude_m), ("invols_m_per_v", invols_m_per_v),
                        ("response_v_per_v", response_v_per_v)):
        if not (np.isfinite(value) and value > 0):
            raise InputError(f"{name} = {value!r} must be positive and finite")
    drive = free_amplitude_m / invols_m_per_v / response_v_per_v
    if max_drive_v is not None and drive > max_drive_v:
        raise InputError(f"a free amplitude of {free_amplitude_m * 1e9:.4g} nm needs a drive of {drive:.4g} V, "
                         f"above the drive limit of {max_drive_v:.4g} V: ask for a smaller free amplitude")
    return float(drive)


def sweep_response_v_per_v(sweep: SweepResult, frequency_hz: float, *, drive_amplitude_v: float) -> float:
    """Detector amplitude per drive volt [V/V] at ``frequency_hz`` from the fitted sweep model."""
    if not (np.isfinite(drive_amplitude_v) and drive_amplitude_v > 0):
        raise InputError(f"drive_amplitude_v = {drive_amplitude_v!r} must be positive and finite")
    return float(sweep.model(np.array([frequency_hz]))[0][0] / drive_amplitude_v)


def setpoint_from_ratio(free_amplitude_v: float, ratio: float) -> float:
    """Amplitude setpoint [V] = ratio x free amplitude; ratio must lie in (0, 1)."""
    if not 0 < ratio < 1:
        raise InputError(f"setpoint ratio = {ratio!r} must lie strictly between 0 and 1")
    if not (np.isfinite(free_amplitude_v) and free_amplitude_v > 0):
        raise InputError(f"free_amplitude_v = {free_amplitude_v!r} must be positive and finite")
    return float(ratio * free_amplitude_v)


@dataclass(frozen=True)
class QComparison:
    """Q from the sweep versus Q from the thermal fit."""

    q_sweep: float
    q_thermal: float
    ratio: float  # q_sweep / q_thermal
    difference_std: float  # standard deviation of the difference
    z_score: float  # difference / its standard deviation
    consistent: bool  # |z| <= the threshold


def compare_q(sweep, thermal, *, max_z: float = 3.0) -> QComparison:
    """Cross-check Q of a sweep fit and a thermal fit (any objects with ``q`` and ``q_std``)."""
    diff = sweep.q - thermal.q
    std = float(np.hypot(sweep.q_std, thermal.q_std))
    z = diff / std if std > 0 else (0.0 if diff == 0 else np.inf)
    return QComparison(float(sweep.q), float(thermal.q), float(sweep.q / thermal.q), std, float(z),
                       bool(abs(z) <= max_z))
