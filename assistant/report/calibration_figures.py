"""Calibration figures: the thermal spectrum with its fit, and the drive sweep with its fit.

Matplotlib object API on the Agg canvas (no pyplot state, safe in threads and headless runs).
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from assistant.formatting import number, quantity
from assistant.report.images import save_png
from assistant.report.panel_grid import fixed_margins

if TYPE_CHECKING:  # names for the annotations only: the fits' modules load scipy
    from assistant.analysis.calibration.sweep import SweepResult
    from assistant.analysis.calibration.thermal import ThermalResult

__all__ = ["sweep_figure", "thermal_figure", "write_sweep_figure", "write_thermal_figure"]

_DATA = "#4d4d4d"
_FIT = "#d95f02"
_WINDOW = "#1b9e77"
_MAX_POINTS = 4000


def _log_binned(f: np.ndarray, p: np.ndarray, n_out: int) -> tuple[np.ndarray, np.ndarray]:
    """Average into at most n_out log-spaced bins (plotting only: keeps PNGs small and readable)."""
    keep = f > 0
    f, p = f[keep], p[keep]
    if f.size <= n_out:
        return f, p
    edges = np.geomspace(f[0], f[-1] * (1 + 1e-12), n_out + 1)
    idx = np.clip(np.searchsorted(edges, f, side="right") - 1, 0, n_out - 1)
    counts = np.bincount(idx, minlength=n_out)
    ok = counts > 0
    return (np.bincount(idx, f, minlength=n_out)[ok] / counts[ok],
            np.bincount(idx, p, minlength=n_out)[ok] / counts[ok])


def _block_mean(x: np.ndarray, block: int) -> np.ndarray:
    n = x.size // block * block
    return x[:n].reshape(-1, block).mean(axis=1)


def thermal_figure(result: ThermalResult) -> Figure:
    """Three panels: the whole spectrum (log-log) with the fit window shaded, the fit window with the
    fitted model (log-log), and the normalised residuals P/S - 1 in units of their standard deviation."""
    fit = result.fit
    fig = Figure(figsize=(8.0, 8.5))  # fixed margins (.panel_grid): no layout pass
    FigureCanvasAgg(fig)
    ax_all, ax_fit, ax_res = fig.subplots(3, 1, gridspec_kw={"height_ratios": [2, 2, 1]})
    fixed_margins(fig, top=0.55, hspace=0.8)  # a title of two lines above the first panel
    lo, hi = fit.fit_range_hz
    f_model = np.geomspace(lo, hi, 3000)
    model = fit.model(f_model)
    if fit.spectrum is not None:
        f_all, p_all = _log_binned(fit.spectrum.frequencies_hz, fit.spectrum.psd_v2_per_hz, _MAX_POINTS)
        ax_all.loglog(f_all, p_all, color=_DATA, lw=0.7, label="measured (log-binned)")
        ax_all.loglog(f_model, model, color=_FIT, lw=1.2, label="fit (inside the window)")
        ax_all.axvspan(lo, hi, color=_WINDOW, alpha=0.15, label="fit window")
        ax_all.legend(fontsize=8, loc="upper center")  # the empty band between the 1/f noise and the peak
    else:
        ax_all.set_axis_off()
    ax_all.set_xlabel("frequency (Hz)")
    ax_all.set_ylabel("deflection PSD (V²/Hz)")
    title = f"f0 = {quantity(result.f0_hz, 'Hz', result.f0_std_hz)}, Q = {number(result.q, result.q_std)}"
    if result.k_n_per_m is not None:
        title += f", k = {quantity(result.k_n_per_m, 'N/m', result.k_std_n_per_m)}"
    if result.invols_m_per_v is not None:
        title += (f"\noptical-lever sensitivity (InvOLS) = "
                  f"{quantity(result.invols_m_per_v * 1e9, 'nm/V', result.invols_std_m_per_v and result.invols_std_m_per_v * 1e9)}")
    ax_all.set_title(title, fontsize=9)
    block = max(1, fit.frequencies_hz.size // _MAX_POINTS)
    fw, pw = _block_mean(fit.frequencies_hz, block), _block_mean(fit.psd_v2_per_hz, block)
    # The fit window spans a few kHz around the peak: a linear axis in kHz reads better than decades of Hz.
    ax_fit.semilogy(fw / 1e3, pw, color=_DATA, lw=0.6, alpha=0.8, label="measured")
    ax_fit.semilogy(f_model / 1e3, model, color=_FIT, lw=1.4, label="fit: oscillator + background")
    ax_fit.set_xlim(lo / 1e3, hi / 1e3)
    ax_fit.set_xlabel("frequency (kHz)")
    ax_fit.set_ylabel("deflection PSD (V²/Hz)")
    ax_fit.legend(fontsize=8, loc="upper left")  # the far wings are low: the top corners stay clear of data
    # Residual of a block mean of b bins has standard deviation 1/sqrt(b) in these units: rescale to 1.
    resid = _block_mean(fit.normalised_residuals(), block) * np.sqrt(block)
    ax_res.plot(fw / 1e3, resid, ".", ms=2, color=_DATA)
    ax_res.axhline(0.0, color=_FIT, lw=1.0)
    ax_res.set_xlim(lo / 1e3, hi / 1e3)
    ax_res.set_ylabel("residual (σ)")
    ax_res.set_xlabel("frequency (kHz)")
    for ax in (ax_all, ax_fit, ax_res):
        ax.grid(True, which="both", alpha=0.25)
    return fig


def sweep_figure(result: SweepResult) -> Figure:
    """Amplitude and phase of a drive sweep with the fitted driven-oscillator model."""
    fig = Figure(figsize=(8.0, 6.0))  # fixed margins (.panel_grid): no layout pass
    FigureCanvasAgg(fig)
    axa, axp = fig.subplots(2, 1, sharex=True)
    fixed_margins(fig, top=0.4, hspace=0.2)
    f_khz = result.frequencies_hz / 1e3
    fm = np.linspace(result.frequencies_hz[0], result.frequencies_hz[-1], 2000)
    am, pm = result.model(fm)
    # Show the model's phase on the data's branch so a wrap at +-180 deg does not draw a vertical line.
    pm = result.phase_offset_deg + ((pm - result.phase_offset_deg + 180) % 360 - 180)
    pd = result.phase_offset_deg + ((result.phase_deg - result.phase_offset_deg + 180) % 360 - 180)
    axa.plot(f_khz, result.amplitude_v, ".", ms=3, color=_DATA, label="measured")
    axa.plot(fm / 1e3, am, color=_FIT, lw=1.2, label="fit: driven damped oscillator")
    axa.set_ylabel("amplitude (V)")
    axa.set_title(f"f0 = {quantity(result.f0_hz, 'Hz', result.f0_std_hz)}, Q = {number(result.q, result.q_std)}, "
                  f"amplitude at resonance {quantity(result.amplitude_at_resonance_v, 'V')}", fontsize=9)
    axa.legend(fontsize=8, loc="upper left")
    axp.plot(f_khz, pd, ".", ms=3, color=_DATA)
    axp.plot(fm / 1e3, pm, color=_FIT, lw=1.2)
    axp.axhline(result.phase_offset_deg, color=_WINDOW, lw=0.8, ls="--")
    axp.set_ylabel("phase (deg)")
    axp.set_xlabel("drive frequency (kHz)")
    for ax in (axa, axp):
        ax.axvline(result.f0_hz / 1e3, color=_WINDOW, lw=0.8, ls="--")
        ax.grid(True, alpha=0.25)
    return fig


def write_thermal_figure(result: ThermalResult, path: str | Path, *, dpi: int = 120) -> Path:
    """Write :func:`thermal_figure` as a PNG; returns the path."""
    return save_png(thermal_figure(result), path, dpi=dpi)


def write_sweep_figure(result: SweepResult, path: str | Path, *, dpi: int = 120) -> Path:
    """Write :func:`sweep_figure` as a PNG; returns the path."""
    return save_png(sweep_figure(result), path, dpi=dpi)
