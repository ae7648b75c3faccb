"""Calibration figures: PNGs are written, axes carry units, no pyplot state is touched."""

import sys

import numpy as np
import pytest

from assistant.analysis.calibration.sweep import fit_drive_sweep, oscillator_response
from assistant.analysis.calibration import analyse_thermal_record, calibrate_thermal, fit_thermal_spectrum
from assistant.report.calibration_figures import (
    sweep_figure, thermal_figure, write_sweep_figure, write_thermal_figure,
)

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def thermal_result():
    # Oscillator spectrum (one-sided, fluctuation-dissipation) plus white and 1/f background, shaped noise.
    fs, n, f0, q = 1e6, 2**20, 75e3, 200.0
    rng = np.random.default_rng(2)
    f = np.fft.rfftfreq(n, 1 / fs)
    a0 = 2e-14
    u = f / f0
    s = a0 / ((1 - u**2) ** 2 + (u / q) ** 2) + 1e-11 + np.divide(1e-7, f, out=np.zeros_like(f), where=f > 0)
    s[0] = 0
    x = np.fft.irfft(np.sqrt(s * n * fs / 4) * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size)), n)
    return analyse_thermal_record(x, fs, invols_m_per_v=50e-9)


@pytest.fixture(scope="module")
def sweep_result():
    f = np.linspace(74e3, 76e3, 201)
    a, p = oscillator_response(f, f0_hz=75e3, q=200, amplitude_at_resonance_v=0.5, phase_offset_deg=175.0)
    rng = np.random.default_rng(1)
    p = (p + rng.normal(0, 0.3, f.size) + 180) % 360 - 180  # wraps through +-180 deg
    return fit_drive_sweep(f, a + rng.normal(0, 0.003, f.size), p)


def _labels(fig):
    return [(ax.get_xlabel(), ax.get_ylabel()) for ax in fig.axes]


def test_thermal_png(tmp_path, thermal_result):
    out = write_thermal_figure(thermal_result, tmp_path / "thermal.png")
    data = out.read_bytes()
    assert data[:8] == PNG_MAGIC and len(data) > 20_000
    fig = thermal_figure(thermal_result)
    ax_all, ax_fit, ax_res = fig.axes
    assert ax_all.get_xscale() == "log" and ax_all.get_yscale() == "log"
    assert ax_all.get_xlabel() == "frequency (Hz)" and ax_all.get_ylabel() == "deflection PSD (V²/Hz)"
    # the fit window is a few kHz wide: a linear axis in kHz, the PSD still on a log scale
    assert ax_fit.get_xscale() == "linear" and ax_fit.get_yscale() == "log"
    assert ax_fit.get_xlabel() == "frequency (kHz)" and ax_fit.get_ylabel() == "deflection PSD (V²/Hz)"
    lo, hi = ax_fit.get_xlim()
    assert lo == pytest.approx(thermal_result.fit.fit_range_hz[0] / 1e3)
    assert lo < thermal_result.f0_hz / 1e3 < hi
    assert ax_res.get_xscale() == "linear" and ax_res.get_ylabel() == "residual (σ)"
    assert ax_res.get_xlabel() == "frequency (kHz)" and ax_res.get_xlim() == ax_fit.get_xlim()
    assert len(ax_fit.get_lines()) == 2
    assert "e+" not in ax_all.get_title() and "kHz" in ax_all.get_title()


def test_thermal_png_without_spectrum(tmp_path):
    f = np.arange(70e3, 80e3, 5.0)
    u = f / 75e3
    s = 1e-14 / ((1 - u**2) ** 2 + (u / 200) ** 2) + 1e-11
    p = s * np.random.default_rng(0).gamma(20, 1 / 20, f.size)
    fit = fit_thermal_spectrum(f, p, averages=20, background="white")
    out = write_thermal_figure(calibrate_thermal(fit, k_n_per_m=2.8), tmp_path / "t2.png")
    assert out.read_bytes()[:8] == PNG_MAGIC


def test_sweep_png(tmp_path, sweep_result):
    out = write_sweep_figure(sweep_result, tmp_path / "sweep.png")
    assert out.read_bytes()[:8] == PNG_MAGIC
    labels = _labels(sweep_figure(sweep_result))
    assert labels[0][1] == "amplitude (V)" and labels[1][1] == "phase (deg)"
    assert labels[1][0] == "drive frequency (kHz)"


def test_no_pyplot_state():
    assert "matplotlib.pyplot" not in sys.modules or not __import__("matplotlib.pyplot").pyplot.get_fignums()
