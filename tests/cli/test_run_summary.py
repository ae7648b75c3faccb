"""The closing summary's calibration, shared by lift and field series (``mfma run``)."""

from __future__ import annotations

from types import SimpleNamespace

from assistant.cli.cmd_run import calibration_summary, calibration_text


def test_a_session_that_calibrated_reports_its_own_numbers_with_the_optical_lever_sensitivity():
    cal = SimpleNamespace(k_n_per_m=2.8, k_std_n_per_m=0.1, thermal=SimpleNamespace(f0_hz=75e3, q=200.0),
                          invols_m_per_v=50e-9)
    calib = calibration_summary(SimpleNamespace(calibration=cal))
    assert calib == {"k_n_per_m": 2.8, "k_std_n_per_m": 0.1, "f0_hz": 75e3, "q": 200.0,
                     "invols_nm_per_v": 50.0}
    assert calibration_text(calib) == "k 2.80 ± 0.10 N/m, f0 75 kHz, Q 200, optical-lever sensitivity 50 nm/V"


def test_a_session_given_its_numbers_reports_them_without_an_uncertainty_or_sensitivity():
    wf = SimpleNamespace(calibration=None, spring_constant_n_per_m=2.8, quality_factor=200.0,
                         drive=SimpleNamespace(frequency_hz=75e3))
    calib = calibration_summary(wf)
    assert calib["k_std_n_per_m"] is None and calib["invols_nm_per_v"] is None and calib["f0_hz"] == 75e3
    assert calibration_text(calib) == "k 2.8 N/m, f0 75 kHz, Q 200"
    assert calibration_summary(SimpleNamespace(calibration=None, spring_constant_n_per_m=2.8, quality_factor=200.0,
                                               drive=None))["f0_hz"] is None
