"""``mfma analyze series`` on .npz stacks built from the published physics (tests/analysis/synthetic_series.py:
Laplace continuation of a film's stray field, exact sphere-plane electrostatics, Hamaker van der Waals), as a user
runs it: JSON keys of the contract, the recovered parts, and one-line errors for bad stacks."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tests.analysis.lift_series import synthetic_series as synthetic

KEYS = ("heights_nm", "magnetic_rms_deg", "electrostatic_mean_deg", "short_range_mean_deg", "residual_rms_deg",
        "drift_px", "cpd_v", "recommended_lift_nm")


def save(path: Path, s, **override) -> Path:
    kw = s.analysis_kwargs
    data = {"phase_deg": s.phase_deg, "heights_nm": s.heights_m * 1e9, "pixel_nm": s.pixel_m * 1e9,
            "spring_constant_n_per_m": kw["spring_constant_n_per_m"], "quality_factor": kw["quality_factor"],
            "tip_radius_nm": kw["tip_radius_m"] * 1e9, "amplitude_nm": kw["amplitude_m"] * 1e9}
    if s.bias_v is not None:
        data["bias_v"] = s.bias_v
    data.update(override)
    np.savez(path, **data)
    return path


def analyze(path: Path, *extra: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "assistant", "analyze", "series", str(path), "--json", *extra],
                          capture_output=True, text=True, timeout=240)


@pytest.fixture(scope="module")
def bias_series():
    return synthetic.build_series(rows=64, cols=64, pixel_m=15e-9, bias_v=np.array([-0.5, 0.0, 0.5, 1.0]),
                                  noise_deg=0.02, margin_px=24, seed=23)


def test_json_contract_and_recovered_parts(tmp_path, bias_series):
    s = bias_series
    out = analyze(save(tmp_path / "s.npz", s))
    assert out.returncode == 0, out.stderr
    d = json.loads(out.stdout)
    for key in KEYS:
        assert key in d, key
    assert d["heights_nm"] == pytest.approx(list(s.heights_m * 1e9))
    # a hard synthetic film with no tip-induced term, no repeat pass: negligible, and the evidence says what
    # could not be checked
    assert d["interaction_regime"] == "negligible" and "no repeat pass" in d["interaction_evidence"]
    # the same tolerances as the analysis tests: magnetic within 5 % (about the mean, over the region the
    # estimator reports it on: the interior for the reflected-edge fit, the whole scan for the windowed one),
    # V_cpd within 20 mV
    assert d["edge"] in ("reflect", "window")
    b = d["edge_band_px"] if d["edge"] == "reflect" else 0
    truth = np.std(s.magnetic_phase_deg[:, b:s.magnetic_phase_deg.shape[1] - b, b:s.magnetic_phase_deg.shape[2] - b],
                   axis=(1, 2))
    np.testing.assert_allclose(d["magnetic_rms_deg"], truth, rtol=0.05)
    assert abs(d["cpd_v"] - s.cpd_v) < 0.020
    assert np.asarray(d["drift_px"]).shape == (len(s.heights_m), 2)
    assert "magnetic_rms_std_deg" in d and "cpd_std_v" in d


def test_edge_estimators_agree_where_each_reports(tmp_path, bias_series):
    # the windowed fit reports the magnetic rms over the whole scan, the reflected-edge one over its interior:
    # each within 5 % of the truth over its region
    s = bias_series
    p = save(tmp_path / "s.npz", s)
    out = analyze(p, "--edge", "window")
    assert out.returncode == 0, out.stderr
    d = json.loads(out.stdout)
    assert d["edge"] == "window" and d["edge_band_px"] == 0
    np.testing.assert_allclose(d["magnetic_rms_deg"], np.std(s.magnetic_phase_deg, axis=(1, 2)), rtol=0.05)
    assert abs(d["cpd_v"] - s.cpd_v) < 0.020
    out = analyze(p, "--edge", "sideways")
    assert out.returncode == 2 and "edge" in out.stderr


@pytest.mark.parametrize("case, needle", [
    ("two_heights", "height"),
    ("heights_mismatch", "height"),
    ("not_increasing", "increasing"),
    ("two_biases", "bias"),
    ("mostly_nan", "nan"),
    ("missing_key", "pixel_nm"),
    ("unknown_key", "unknown"),
])
def test_bad_stacks_exit_2_with_one_line(tmp_path, bias_series, case, needle):
    s = bias_series
    phase, heights = s.phase_deg, s.heights_m * 1e9
    p = tmp_path / f"{case}.npz"
    if case == "two_heights":
        save(p, s, phase_deg=phase[:2], heights_nm=heights[:2])
    elif case == "heights_mismatch":
        save(p, s, heights_nm=heights[:-1])
    elif case == "not_increasing":
        save(p, s, heights_nm=heights[::-1].copy())
    elif case == "two_biases":
        save(p, s, phase_deg=phase[:, :2], bias_v=s.bias_v[:2])
    elif case == "mostly_nan":
        bad = phase.copy()
        bad[..., : bad.shape[-1] // 2] = np.nan
        save(p, s, phase_deg=bad)
    elif case == "missing_key":
        np.savez(p, phase_deg=phase, heights_nm=heights)
    elif case == "unknown_key":
        save(p, s, colour="blue")
    out = analyze(p)
    assert out.returncode == 2, (out.stdout, out.stderr)
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in out.stderr
    assert needle.lower() in lines[0].lower(), lines[0]
