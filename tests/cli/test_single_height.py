"""``mfma run`` with one or two lift heights, as a new user runs it: the session file, the report and the JSON,
the decomposition skipped with one sentence, and ``mfma analyze series`` refusing such a file with exit 2."""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import pytest

from assistant.cli import main

QUICK = ["--lines", "8", "--pixels", "32", "--thermal-seconds", "0.5", "--seed", "5"]


def run_json(capsys, *argv: str) -> tuple[int, dict | None, str]:
    code = main(["run", *argv, "--json"])
    out, err = capsys.readouterr()
    return code, (json.loads(out) if out.strip() else None), err


@pytest.fixture(scope="module")
def single(tmp_path_factory):
    out = tmp_path_factory.mktemp("single")
    capture = pytest.MonkeyPatch()
    import io
    import sys

    buf, errbuf = io.StringIO(), io.StringIO()
    capture.setattr(sys, "stdout", buf)
    capture.setattr(sys, "stderr", errbuf)
    try:
        code = main(["run", "--heights", "30", *QUICK, "--out", str(out), "--json"])
    finally:
        capture.undo()
    assert code == 0, errbuf.getvalue()
    return json.loads(buf.getvalue()), out


def test_single_height_run_writes_everything(single):
    d, out = single
    assert d["series"] == {"heights_nm": [30.0], "completed_lines": 8}
    a = d["analysis"]
    assert a["kind"] == "imaging" and "at least 3 lift heights" in a["decomposition"]
    assert "recommended_lift_nm" not in a and "magnetic_rms_deg" not in a
    # the default bias grid (-0.5, 0, 0.5, 1 V) gives V_cpd without a height series; the default scenario's
    # contact potential is 0.35 V with a 0.02 V patch (the stage against its own setting: a smoke check)
    assert abs(a["cpd_v"] - 0.35) < 0.03 and 0 < a["cpd_std_v"] < 0.01
    assert a["noise_verdict"] in ("thermal_limit", "excess_noise") and a["thermal_phase_noise_deg"] > 0
    assert a["tip_changed_sample"] is False
    with h5py.File(d["session_file"], "r") as f:
        assert bool(f.attrs["complete"]) and f["analysis/series1"].attrs["kind"] == "imaging"
    report = Path(d["report_dir"])
    names = {p.name for p in report.glob("*.png")}
    assert {"series1_topography.png", "series1_second_passes.png", "series1_bias_parabola.png"} <= names
    summary = (report / "summary.md").read_text()
    assert "need at least 3 lift heights" in summary and "V_cpd =" in summary
    assert "failed" not in summary  # no figure fell over


def test_analyze_series_refuses_a_single_height_file_with_one_line(single, capsys):
    d, _ = single
    assert main(["analyze", "series", d["session_file"]]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "at least 3 lift heights" in err and "has 1" in err


def two_height_session(path: Path) -> Path:
    """A session file of two heights, one bias, with a repeat pass, written through the session-file API from a
    stack built from the published physics (tests/analysis/lift_series/synthetic_series.py)."""
    from assistant.procedures.series import SeriesSettings
    from assistant.storage.session_file import SessionFile
    from tests.analysis.lift_series import synthetic_series as synthetic

    s = synthetic.build_series(rows=16, cols=32, pixel_m=25e-9, heights_m=(20e-9, 40e-9), noise_deg=0.03,
                               repeat=True, margin_px=8, seed=12)
    settings = SeriesSettings(heights_m=(20e-9, 40e-9), lines=16, pixels=32, scan_size_m=0.8e-6)
    stored = json.loads(settings.to_json())
    stored.update(spring_constant_n_per_m=2.8, quality_factor=200.0, temperature_k=298.15,
                  drive={"frequency_hz": 75e3, "free_amplitude_m": 10e-9, "setpoint_ratio": 0.7})
    with SessionFile.create(path, controller_url="sim://", software_version="test") as sf:
        w = sf.create_series("series1", heights_m=settings.heights_m, biases_v=None, lines=16, pixels=32,
                             scan_size_m=0.8e-6, line_rate_hz=1.0, order=settings.order, repeat_first=True,
                             settings_json=json.dumps(stored))
        for row in range(16):
            w.write_line(row, topography_m=s.phase_deg[0, row] * 0, phase_deg=s.phase_deg[:, row],
                         amplitude_v=s.phase_deg[:, row] * 0 + 0.3, repeat_phase_deg=s.repeat_phase_deg[row])
    return path


def test_two_heights_are_analysed_without_the_decomposition(tmp_path, capsys):
    from assistant.procedures.analyse import analyse_session_series
    from assistant.report.imaging_figures import imaging_overview_figure
    from assistant.storage.session_file import SessionFile

    path = two_height_session(tmp_path / "two.h5")
    with SessionFile.open(path, "a") as sf:
        a = analyse_session_series(sf, None)  # stored, as ``mfma run`` does
        data = sf.read_series("series1")
        assert sf.read_analysis("series1").scalars["kind"] == "imaging"
    d = a.to_dict()
    assert "has 2" in d["decomposition"] and "cpd_v" not in d and "recommended_lift_nm" not in d
    assert len(d["image_mean_deg"]) == 2 and d["noise_source"].startswith("the repeat pass")
    assert d["phase_noise_deg"] == pytest.approx(0.03, rel=0.15)
    assert d["noise_verdict"] != "unknown"  # k, Q, f0, the amplitude and the bandwidth all came from the file
    # the figure is built, not drawn (drawing is the single-height run's job and costs a second or two here):
    # the two heights side by side, then the repeat, repeat - first and one amplitude image per height
    fig = imaging_overview_figure(data, a)
    shown = [ax.get_title() for sub in fig.subfigs for ax in sub.axes if ax.axison and ax.get_title()]
    assert shown == ["lift 20 nm", "lift 40 nm", "lift 20 nm, repeat", "repeat - first (0.0% changed)",
                     "amplitude, lift 20 nm", "amplitude, lift 40 nm"]
    assert main(["analyze", "series", str(path), "--json"]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and "has 2" in captured.err


def test_analyze_series_refuses_a_two_height_stack(tmp_path, capsys):
    import numpy as np

    path = tmp_path / "two.npz"
    np.savez(path, phase_deg=np.zeros((2, 8, 8)), heights_nm=[20.0, 40.0], pixel_nm=10.0)
    assert main(["analyze", "series", str(path), "--json"]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and "has 2" in captured.err and len(captured.err.strip().splitlines()) == 1
