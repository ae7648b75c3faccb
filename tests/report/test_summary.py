"""Session report: figures written, every stored number in summary.md with unit and uncertainty."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

from assistant.report import summary
from assistant.report.summary import build_report, format_value
from assistant.storage import SessionFile

PNG = b"\x89PNG\r\n\x1a\n"
CAL = {"k_n_per_m": 2.8012, "k_std_n_per_m": 0.0834, "f0_hz": 75012.31, "f0_std_hz": 2.13, "q": 201.3,
       "q_std": 4.2, "invols_nm_per_v": 54.31, "invols_std_nm_per_v": 1.17, "temperature_k": 295.15,
       "k_source": "thermal"}


@pytest.mark.parametrize("value, std, text", [
    (2.8012, 0.0834, "2.801 ± 0.083"), (75012.31, 2.13, "75012.3 ± 2.1"), (201.3, 4.2, "201.3 ± 4.2"),
    (1234.5, 560.0, "1230 ± 560"), (3.0e-9, 1.04e-10, "(3.00 ± 0.10) × 10⁻⁹"), (0.31, 0.02, "0.310 ± 0.020"),
    (295.15, None, "295.15"), (1.0, float("nan"), "1"), (-0.4, 0.0, "-0.4"),
])
def test_format_value(value, std, text):
    assert format_value(value, std) == text


def _session(path, *, biases=None, lines_done=24):
    heights = [10e-9, 20e-9, 40e-9]
    with SessionFile.create(path, controller_url="sim://", scenario_text="[probe]\nquality_factor = 200\n",
                            software_version="0.1.0") as s:
        s.write_calibration(CAL)
        s.write_approach({"engaged": 1, "z_m": 4.2e-6}, {"trace_z_m": np.linspace(0, 4.2e-6, 5)})
        w = s.create_series("lift", heights_m=heights, biases_v=biases, lines=32, pixels=32, scan_size_m=3e-6,
                            line_rate_hz=1.0, order="topography,heights", repeat_first=biases is None,
                            settings_json=json.dumps({"name": "lift", "lines": 32}))
        x = np.linspace(0, 1, 32)
        lead = (3,) if biases is None else (3, len(biases))
        for i in range(lines_done):
            ph = np.ones(lead + (32,)) * np.sign(np.sin(2 * np.pi * 2 * x))
            ph = ph * np.exp(-np.asarray(heights) / 30e-9).reshape((3,) + (1,) * (len(lead)))
            w.write_line(i, topography_m=1e-9 * np.sin(6 * x), phase_deg=ph, amplitude_v=np.ones_like(ph),
                         repeat_phase_deg=ph[0] if biases is None else None)
        s.write_analysis("lift", {"recommended_lift_nm": 25.0, "cpd_v": 0.31, "cpd_std_v": 0.02},
                         {"magnetic_rms_deg": np.array([1.5, 1.0, 0.5]),
                          "magnetic_rms_std_deg": np.array([0.05, 0.04, 0.03])})


def _quick_series_figures(result, directory, **options):
    # stand-ins for the decomposition figures (drawn for real in test_series_figures): the file names only
    paths = [directory / f"decomposition_{stem}.png" for stem in ("mean", "magnetic", "maps")]
    for path in paths:
        path.write_bytes(PNG)
    return paths


def test_report_figures_and_every_number(tmp_path, monkeypatch):
    _session(tmp_path / "s.h5")
    monkeypatch.setattr(summary, "write_series_figures", _quick_series_figures)
    result = build_report(tmp_path / "s.h5", tmp_path / "out")
    names = sorted(p.name for p in result.paths)
    # no decomposition stored with the series (a hand-made record): the figures come from one computed now
    assert names == ["decomposition_magnetic.png", "decomposition_maps.png", "decomposition_mean.png",
                     "lift_phase.png", "lift_topography.png", "summary.md"]
    for p in result.paths:
        assert p.is_file()
        if p.suffix == ".png":
            assert p.read_bytes()[:8] == PNG
    text = (tmp_path / "out" / "summary.md").read_text(encoding="utf-8")
    assert text == result.summary_text
    # readable names, the unit with the value (prefixed to suit it), ± for every uncertainty
    for line in ("| spring constant k | 2.801 ± 0.083 N/m |", "| resonance f0 | 75.0123 ± 0.0021 kHz |",
                 "| quality factor Q | 201.3 ± 4.2 |", "| optical-lever sensitivity (InvOLS) | 54.3 ± 1.2 nm/V |",
                 "| temperature | 295.15 K |", "| k from | thermal |", "| engaged | yes |",
                 "- **Recommended lift height:** 25 nm", "- **Recommended tip bias:** 310 ± 20 mV",
                 "- magnetic rms: 1.500 ± 0.050°, 1.000 ± 0.040°, 0.500 ± 0.030°",
                 "- trace: Z extension: 0, 1.05, 2.1, 3.15, 4.2 µm",
                 "- completed lines: 24 of 32 (partial)", "- lift heights: 10, 20, 40 nm",
                 "quality_factor = 200", '"lines": 32'):
        assert line in text, line
    assert text.index("## Results") < text.index("## Probe calibration")  # the results open the summary
    assert "k_std_n_per_m" not in text  # folded into the ± of k
    assert "| 10 (repeat) | — |" in text and "session complete: no" in text
    tables = [row for row in text.splitlines() if row.startswith("| ")]
    assert not [r for r in tables if re.match(r"\| [a-z0-9]+(_[a-z0-9]+)+ \|", r)], "snake_case key in a table"
    assert not [r for r in tables if r.endswith("| 1 |")], "'1' as a unit"
    assert "e-0" not in text and "e+0" not in text  # no e-notation
    assert result.notes == ()


def test_bias_grid_gives_one_phase_figure_per_bias(tmp_path):
    _session(tmp_path / "b.h5", biases=[-1.0, 1.0], lines_done=5)
    result = build_report(tmp_path / "b.h5", tmp_path / "out")
    names = sorted(p.name for p in result.paths)
    assert names == ["lift_phase_bias0.png", "lift_phase_bias1.png", "lift_topography.png", "summary.md"]
    assert "| 20 | -1 |" in result.summary_text and "- tip biases: -1, 1 V" in result.summary_text
    # five lines are too few to decompose: no decomposition figures, and the summary says why
    assert result.notes == ("decomposition figures of 'lift' failed: ImageShapeError: images must be at least "
                            "8 x 8 pixels, got (5, 32)",)


def test_a_failing_figure_becomes_a_note(tmp_path, monkeypatch):
    _session(tmp_path / "s.h5", lines_done=8)

    def broken(result, directory, **options):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(summary, "write_series_figures", broken)
    result = build_report(tmp_path / "s.h5", tmp_path / "out")
    assert result.notes == ("decomposition figures of 'lift' failed: RuntimeError: disk on fire",)
    assert sorted(p.name for p in result.paths) == ["lift_phase.png", "lift_topography.png", "summary.md"]
    assert "- disk on fire" not in result.summary_text and "RuntimeError: disk on fire" in result.summary_text


def test_the_report_draws_the_stored_decomposition_without_computing_it_again(tmp_path, monkeypatch):
    from assistant.procedures import analyse

    _session(tmp_path / "s.h5")
    with SessionFile.open(tmp_path / "s.h5", "a") as s:
        stored = analyse.analyse_session_series(s, "lift")
    drawn = []
    monkeypatch.setattr(summary, "write_series_figures", lambda result, directory, **o: drawn.append(result) or [])

    def no_second_decomposition(*args, **kwargs):
        raise AssertionError("the report decomposed the series again")

    monkeypatch.setattr(analyse, "analyse_series", no_second_decomposition)
    result = build_report(tmp_path / "s.h5", tmp_path / "out")
    assert result.notes == () and len(drawn) == 1
    np.testing.assert_array_equal(drawn[0].magnetic_deg, stored.magnetic_deg)
    assert drawn[0].recommendation.sentence == stored.recommendation.sentence
    # the tip-sample interaction regime is stored and shown among the results
    assert drawn[0].interaction.evidence == stored.interaction.evidence
    assert f"- **Tip-sample interaction:** {stored.interaction.evidence}" in result.summary_text


def test_session_without_series_still_gets_a_summary(tmp_path):
    with SessionFile.create(tmp_path / "e.h5", controller_url="sim://", software_version="0.1.0") as s:
        s.write_calibration({"f0_hz": 13000.0})
        s.mark_complete()
    result = build_report(tmp_path / "e.h5", tmp_path / "deep" / "out")
    assert [p.name for p in result.paths] == ["summary.md"]
    assert "| resonance f0 | 13 kHz |" in result.summary_text and "session complete: yes" in result.summary_text


def test_calibration_figures_refit_the_stored_sweep_and_spectrum(tmp_path, monkeypatch):
    from assistant.analysis.calibration.sweep import oscillator_response
    from assistant.analysis.calibration import oscillator_psd

    f = np.linspace(74e3, 76e3, 201)
    amp, phase = oscillator_response(f, f0_hz=75e3, q=200.0, amplitude_at_resonance_v=0.02, phase_offset_deg=-5.0)
    fs = np.linspace(0, 1e6, 2**15 + 1)
    # a noiseless expected spectrum with 20 averages: the refit must come back to f0 = 75 kHz, Q = 200
    psd = oscillator_psd(fs, f0_hz=75e3, q=200.0, a0_v2_per_hz=2e-14, white_v2_per_hz=1e-16)
    with SessionFile.create(tmp_path / "c.h5", controller_url="sim://", software_version="0.1.0") as s:
        s.write_calibration({"spectrum_segments": 20, "temperature_k": 295.0, "invols_nm_per_v": 50.0},
                            {"spectrum_frequency_hz": fs, "spectrum_psd_v2_per_hz": psd})
        s.write_resonance({"f0_hz": 75e3}, {"frequency_hz": f, "amplitude_v": amp, "phase_deg": phase})
    seen = {}

    def write_thermal_figure(result, path):
        seen["thermal"] = result
        path.write_bytes(PNG)
        return path

    def write_sweep_figure(result, path):
        seen["sweep"] = result
        path.write_bytes(PNG)
        return path

    monkeypatch.setattr(summary, "write_thermal_figure", write_thermal_figure)
    monkeypatch.setattr(summary, "write_sweep_figure", write_sweep_figure)
    result = build_report(tmp_path / "c.h5", tmp_path / "out")
    assert sorted(p.name for p in result.paths) == ["summary.md", "sweep.png", "thermal.png"]
    assert seen["sweep"].f0_hz == pytest.approx(75e3, rel=1e-6) and seen["sweep"].q == pytest.approx(200, rel=1e-4)
    assert seen["thermal"].fit.f0_hz == pytest.approx(75e3, rel=1e-4)
    assert seen["thermal"].fit.q == pytest.approx(200, rel=0.02)


def test_second_report_into_the_same_folder_lists_the_same_files(tmp_path, monkeypatch):
    _session(tmp_path / "s.h5", lines_done=8)

    monkeypatch.setattr(summary, "write_series_figures", _quick_series_figures)
    first = build_report(tmp_path / "s.h5", tmp_path / "out")
    second = build_report(tmp_path / "s.h5", tmp_path / "out")
    assert [p.name for p in first.paths] == [p.name for p in second.paths]
    assert "decomposition_maps.png" in [p.name for p in second.paths]


def test_the_recommended_bias_carries_its_whole_uncertainty():
    # V_cpd's noise part and its model part (the Birge excess of a bias grid whose parabolas misfit) in
    # quadrature, as the decomposition's own sentence and every other value of the results do: 30 and 40 uV
    # make 50 uV (the line used to show the noise part alone)
    from assistant.report.results import results_block

    pairs = dict(results_block({"cpd_v": 0.352, "cpd_std_v": 3e-5, "cpd_model_std_v": 4e-5}))
    assert pairs["Recommended tip bias"].startswith("352.000 ± 0.050 mV")
    assert dict(results_block({"cpd_v": 0.31, "cpd_std_v": 0.02}))["Recommended tip bias"].startswith("310 ± 20 mV")
