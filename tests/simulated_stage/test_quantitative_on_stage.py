"""Quantitative MFM end to end on the simulated stage, as a lab would do it: calibrate the tip on the built-in
reference film, then map the default coupon's stray field with the stored TTF and compare with the stage's own
field (``Sample.true_hz_a_per_m``, exact per Fourier component of the film's charges).

The stage checked against itself is not an outside check; what is checked against the outside is the analysis
(tests/analysis/quantitative). Here the point is that the chain holds together on an instrument-like data path
(lever calibration, approach, tapping first pass, lift passes, thermal phase noise). Both scenarios are run without
XY drift: the truth is evaluated at the commanded pixel positions.
"""

from __future__ import annotations

from importlib import resources

import numpy as np

from assistant.analysis.quantitative import band_taper, point_probe_ttf
from assistant.procedures.calibrate import CalibrationSettings
from assistant.procedures.quantitative import calibrate_tip_file
from assistant.procedures.series import SeriesSettings
from assistant.procedures.workflow import Workflow
from assistant.storage.probe_record import ProbeRecord
from drivers.registry import open_controller
from simulated_stage.scenario import Scenario

N, PIXEL = 96, 20e-9


def _no_drift(name: str) -> Scenario:
    text = (resources.files("simulated_stage") / "scenarios" / f"{name}.toml").read_text(encoding="utf-8")
    text = text.replace("drift_x_nm_per_s = 0.02", "drift_x_nm_per_s = 0.0")
    text = text.replace("drift_y_nm_per_s = -0.01", "drift_y_nm_per_s = 0.0")
    return Scenario.from_text(text, name=name)


def _session(name: str, path, record, seed: int):
    ctl = open_controller("sim://", scenario=_no_drift(name), seed=seed)
    wf = Workflow(ctl, path)
    wf.calibrate(CalibrationSettings(probe_name="P7", thermal_seconds=0.3), probe_record=record)
    wf.approach()
    wf.series(SeriesSettings(heights_m=(20e-9,), lines=N, pixels=N, scan_size_m=N * PIXEL, repeat_first=False))
    return ctl, wf


def test_calibrate_on_the_reference_then_map_the_default_coupon(tmp_path):
    record = ProbeRecord(tmp_path / "record")
    ctl, wf = _session("reference-film", tmp_path / "ref.h5", record, seed=1)
    wf.close()
    sc = _no_drift("reference-film").sample
    tip = calibrate_tip_file(tmp_path / "ref.h5", ms_a_per_m=sc.saturation_magnetisation_ka_per_m * 1e3,
                             thickness_m=sc.thickness_nm * 1e-9, out=tmp_path / "tip.npz", probe="P7", record=record)
    # the simulated tip is a point dipole of 1e-16 A m^2, 30 nm behind the apex, oscillating with the drive's
    # amplitude: its TTF is the analytic point-probe form times the oscillation weight
    cal = tip.calibration
    band = np.isfinite(cal.ttf_n_per_a)
    exact = point_probe_ttf(cal.transfer.k_per_m[band], moment_a_m2=1e-16, monopole_a_m=0.0, offset_m=30e-9,
                            amplitude_m=cal.amplitude_m)
    ratio = cal.ttf_n_per_a[band] / exact
    assert abs(np.median(ratio) - 1) < 0.05 and np.percentile(np.abs(ratio - 1), 90) < 0.12

    ctl2, wf2 = _session("default", tmp_path / "sample.h5", record, seed=2)
    from assistant.storage.quantitative_files import read_tip_file

    result = wf2.field_map(read_tip_file(record.tip_transfer_file(record.tip_transfers("P7")[-1])), record=record)
    fm = result.field_map
    # the stage's own field at the measurement plane, band-passed over an area larger than the scan, cut to it
    sample = ctl2.stage.sample
    pad = N // 2
    x = (np.arange(-pad, N + pad) + 0.5) * PIXEL
    xx, yy = np.meshgrid(x, x)
    whole = sample.true_hz_a_per_m(xx, yy, fm.plane_m)
    k = np.hypot(2 * np.pi * np.fft.fftfreq(x.size, d=PIXEL)[:, None], 2 * np.pi * np.fft.rfftfreq(x.size, d=PIXEL))
    passed = np.fft.irfft2(np.fft.rfft2(whole - whole.mean()) * band_taper(k, fm.band_k_per_m), s=whole.shape)
    truth = passed[pad:pad + N, pad:pad + N]
    m = fm.margin_px
    a, b = fm.hz_a_per_m[m:N - m, m:N - m], truth[m:N - m, m:N - m]
    assert np.corrcoef(a.ravel(), b.ravel())[0, 1] > 0.95
    assert abs(a.std() / b.std() - 1) < 0.10
    z = (a - b) / fm.hz_std_a_per_m[m:N - m, m:N - m]
    assert np.mean(np.abs(z) < 2) > 0.85
    wf2.session.flush()
    assert wf2.session.field_map_names() == ["series1"]
    wf2.close()
