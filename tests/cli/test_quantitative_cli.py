"""``mfma analyze tip`` and ``mfma analyze field`` in-process, as a user calls them on .npz files made from the
analytic point-probe TTF (Hartmann 1999; Lohau et al. 1999): the contract's keys, the probe record, bad input."""

from __future__ import annotations

import json

import numpy as np
import pytest

from assistant.cli import main
from tests.analysis.quantitative.synthetic import make_image

K_SPRING, Q = 2.8, 200.0
TIP = dict(moment_a_m2=1e-16, monopole_a_m=-3e-9, offset_m=30e-9)


def _phase(grad):
    return -np.degrees(np.arctan(Q * grad / K_SPRING))   # phase = -arctan(Q F'/k): attractive reads negative


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("q")
    ref = make_image(n=128, oversample=2, pixel_m=10e-9, period_m=200e-9, ms=6e5, thickness_m=12e-9,
                     height_m=20e-9, noise_n_per_m=1e-4, seed=3, crop=(256, 40, 70), **TIP)
    sam = make_image(n=128, oversample=2, pixel_m=10e-9, period_m=300e-9, ms=9e5, thickness_m=20e-9,
                     height_m=25e-9, noise_n_per_m=1e-4, seed=4, crop=(256, 30, 20), **TIP)
    common = dict(pixel_nm=10.0, spring_constant_n_per_m=K_SPRING, quality_factor=Q)
    np.savez(d / "ref.npz", phase_deg=_phase(ref.gradient_n_per_m), lift_nm=20.0, **common)
    np.savez(d / "sample.npz", phase_deg=_phase(sam.gradient_n_per_m), lift_nm=25.0, **common)
    np.savez(d / "sample_20nm.npz", phase_deg=_phase(sam.gradient_n_per_m[::2, ::2]), lift_nm=25.0,
             **{**common, "pixel_nm": 20.0})
    return d, ref, sam


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def record_dir(tmp_path_factory):
    data = tmp_path_factory.mktemp("data")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("MFMA_DATA_DIR", str(data))
        yield data


@pytest.fixture(scope="module")
def tip_file(files, record_dir):
    d, _, _ = files
    argv = ["analyze", "tip", str(d / "ref.npz"), "--ms-ka-per-m", "600", "--thickness-nm", "12", "--probe", "P1",
            "--out", str(d / "tip.npz"), "--json"]
    import contextlib
    import io

    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(argv) == 0
    return d / "tip.npz", json.loads(out.getvalue())


def test_tip_json_has_the_contract_keys(tip_file):
    path, d = tip_file
    for key in ("band_nm", "regularization", "dipole_a_m2", "dipole_std_a_m2", "monopole_a_m", "monopole_std_a_m",
                "offset_nm", "offset_std_nm", "tip_file"):
        assert key in d
    assert d["tip_file"] == str(path) and path.is_file()
    lo, hi = d["band_nm"]
    assert 35 <= lo < hi <= 1280 / 6 + 1e-6
    # the point-probe dipole comes out near the invented tip's (exact Ms and t here; stated uncertainty 5 % each)
    assert d["dipole_a_m2"] == pytest.approx(1e-16, rel=0.3)
    assert "z points away from the sample" in d["conventions"]


def test_tip_is_stored_in_the_probe_record_and_listed(tip_file, capsys):
    code, out, _ = run(capsys, "probes", "P1", "--json")
    assert code == 0
    entries = json.loads(out)["tip_transfer"]
    assert len(entries) == 1 and entries[0]["band_nm"] == tip_file[1]["band_nm"]
    code, out, _ = run(capsys, "probes", "P1")
    assert "tip transfer function" in out and "band" in out


def test_field_with_tip_file_and_with_probe(files, tip_file, capsys):
    d, _, sam = files
    code, out, err = run(capsys, "analyze", "field", str(d / "sample.npz"), "--tip", str(tip_file[0]), "--out",
                         str(d / "field.npz"), "--json")
    assert code == 0, err
    j = json.loads(out)
    for key in ("hz_rms_a_per_m", "hz_min_a_per_m", "hz_max_a_per_m", "height_nm", "band_nm", "warnings"):
        assert key in j
    with np.load(d / "field.npz") as z:
        assert z["hz_a_per_m"].shape == z["hz_std_a_per_m"].shape == (128, 128)
        assert float(z["height_nm"]) == pytest.approx(25.0) and np.allclose(z["pixel_nm"], 10.0)
    assert j["hz_min_a_per_m"] < 0 < j["hz_max_a_per_m"]
    code, out2, err = run(capsys, "analyze", "field", str(d / "sample.npz"), "--probe", "P1", "--out",
                          str(d / "field2.npz"), "--json")
    assert code == 0, err
    assert json.loads(out2)["hz_rms_a_per_m"] == pytest.approx(j["hz_rms_a_per_m"])


def test_field_map_loads_no_scipy(files, tip_file, tmp_path):
    # loading scipy.fft alone took 0.12-0.15 s of the 0.38 s the command took (tests/benchmarks/bench_commands.py);
    # the map's cosine transforms come from numpy's FFT (checked against scipy in test_fourier.py)
    import os
    import subprocess
    import sys
    from pathlib import Path

    d, _, _ = files
    code = ("import sys, io, contextlib\n"
            "from assistant.cli import main\n"
            "with contextlib.redirect_stdout(io.StringIO()):\n"
            "    assert main(sys.argv[1:]) == 0\n"
            "print(sorted({m.split('.')[0] + '.' + m.split('.')[1] for m in sys.modules if m.startswith('scipy.')}))\n")
    out = subprocess.run([sys.executable, "-c", code, "analyze", "field", str(d / "sample.npz"), "--tip",
                          str(tip_file[0]), "--out", str(tmp_path / "f.npz"), "--json"], capture_output=True,
                         text=True, cwd=Path(__file__).resolve().parents[2], check=True,
                         env={**os.environ, "MFMA_DATA_DIR": str(tmp_path / "data")})
    assert out.stdout.strip().splitlines()[-1] == "[]", out.stdout + out.stderr


def test_ttf_older_than_a_calibration_is_refused(files, record_dir, capsys):
    from datetime import datetime, timedelta, timezone

    from assistant.storage.probe_record import ProbeRecord

    d, _, _ = files
    code, out, err = run(capsys, "analyze", "tip", str(d / "ref.npz"), "--ms-ka-per-m", "600", "--thickness-nm",
                         "12", "--probe", "P2", "--out", str(d / "tip2.npz"))
    assert code == 0, err
    later = datetime.now(timezone.utc) + timedelta(hours=1)              # the probe calibrated after its TTF
    ProbeRecord().add("P2", {"k_n_per_m": 2.8, "f0_hz": 75e3, "probe_name": "P2"}, now=later)
    code, out, err = run(capsys, "analyze", "field", str(d / "sample.npz"), "--probe", "P2", "--out",
                         str(d / "f3.npz"))
    assert code == 2 and "older than the probe's calibration" in err and len(err.strip().splitlines()) == 1


def test_other_pixel_size_is_resampled(files, tip_file, capsys):
    d, _, _ = files
    code, out, err = run(capsys, "analyze", "field", str(d / "sample_20nm.npz"), "--tip", str(tip_file[0]),
                         "--out", str(d / "f20.npz"), "--json")
    assert code == 0, err
    j = json.loads(out)
    assert any("resampled" in n for n in j["notes"]) and j["band_nm"][0] >= 40.0 - 1e-9


def test_tip_figures_are_written(files, record_dir, capsys, tmp_path):
    d, _, _ = files
    code, out, err = run(capsys, "analyze", "tip", str(d / "ref.npz"), "--ms-ka-per-m", "600", "--thickness-nm",
                         "12", "--out", str(tmp_path / "t.npz"), "--plots", str(tmp_path / "figs"), "--json")
    assert code == 0, err
    names = sorted(p.rsplit("/", 1)[-1] for p in json.loads(out)["figures"])
    assert names == ["reference_pattern.png", "ttf.png"]
    assert all((tmp_path / "figs" / n).stat().st_size > 20_000 for n in names)


@pytest.mark.parametrize("extra, needle", [
    (["--ms-ka-per-m", "0", "--thickness-nm", "12"], "--ms-ka-per-m"),
    (["--ms-ka-per-m", "nan", "--thickness-nm", "12"], "--ms-ka-per-m"),
    (["--ms-ka-per-m", "600", "--thickness-nm", "-3"], "--thickness-nm"),
    (["--thickness-nm", "12"], "--ms-ka-per-m"),
])
def test_bad_reference_numbers_exit_2(files, capsys, extra, needle):
    d, _, _ = files
    code, out, err = run(capsys, "analyze", "tip", str(d / "ref.npz"), *extra, "--out", str(d / "x.npz"))
    assert code == 2 and needle in err and len(err.strip().splitlines()) == 1 and out == ""


def test_bad_images_exit_2(files, capsys, tmp_path):
    d, ref, _ = files
    common = dict(pixel_nm=10.0, spring_constant_n_per_m=K_SPRING, quality_factor=Q)
    cases = {
        "flat.npz": (dict(phase_deg=np.zeros((64, 64)) + 0.01 * np.random.default_rng(1).standard_normal((64, 64)),
                          lift_nm=20.0, **common), "no domains"),
        "tiny.npz": (dict(phase_deg=_phase(ref.gradient_n_per_m[:24, :24]), lift_nm=20.0, **common), "too narrow"),
        "shapes.npz": (dict(phase_deg=np.zeros((3, 64, 64)), heights_nm=[20.0, 30.0], **common), "must agree"),
        "fshift.npz": (dict(phase_deg=np.zeros((64, 64)), frequency_shift_hz=np.zeros((32, 64)), lift_nm=20.0,
                            resonance_hz=7.5e4, **common), "differ in shape"),
        "nok.npz": (dict(phase_deg=np.zeros((64, 64)), lift_nm=20.0, pixel_nm=10.0, quality_factor=Q),
                    "spring_constant_n_per_m"),
        "odd.npz": (dict(phase_deg=np.zeros((64, 64)), lift_nm=20.0, colour=1.0, **common), "unknown key"),
    }
    for name, (arrays, needle) in cases.items():
        np.savez(tmp_path / name, **arrays)
        code, out, err = run(capsys, "analyze", "tip", str(tmp_path / name), "--ms-ka-per-m", "600",
                             "--thickness-nm", "12", "--out", str(tmp_path / "t.npz"))
        assert code == 2 and needle in err and len(err.strip().splitlines()) == 1, (name, err)


def test_bad_field_requests_exit_2(files, tip_file, capsys):
    d, _, _ = files
    base = ["analyze", "field", str(d / "sample.npz"), "--out", str(d / "f.npz")]
    for extra, needle in ((["--tip", str(tip_file[0]), "--probe", "P1"], "either"), ([], "either"),
                          (["--tip", str(tip_file[0]), "--height-nm", "10"], "upwards"),
                          (["--tip", str(d / "ref.npz")], "not a tip file"),
                          (["--probe", "nobody"], "no TTF stored")):
        code, out, err = run(capsys, *base, *extra)
        assert code == 2 and needle in err and len(err.strip().splitlines()) == 1, (extra, err)


def test_frequency_shift_images_give_the_same_tip(files, record_dir, capsys, tmp_path):
    # a frequency-modulated second pass: F' = k (1 - (1 + df/f0)^2) (Albrecht et al. 1991); same film, same tip
    d, ref, _ = files
    f0 = 75e3
    df = f0 * (np.sqrt(1.0 - ref.gradient_n_per_m / K_SPRING) - 1.0)
    np.savez(tmp_path / "fm.npz", frequency_shift_hz=df, resonance_hz=f0, lift_nm=20.0, pixel_nm=10.0,
             spring_constant_n_per_m=K_SPRING)
    code, out, err = run(capsys, "analyze", "tip", str(tmp_path / "fm.npz"), "--ms-ka-per-m", "600",
                         "--thickness-nm", "12", "--out", str(tmp_path / "fm_tip.npz"), "--json")
    assert code == 0, err
    j = json.loads(out)
    code, out, err = run(capsys, "analyze", "tip", str(d / "ref.npz"), "--ms-ka-per-m", "600", "--thickness-nm",
                         "12", "--out", str(tmp_path / "ph_tip.npz"), "--json")
    assert j["band_nm"] == json.loads(out)["band_nm"]
    assert j["dipole_a_m2"] == pytest.approx(json.loads(out)["dipole_a_m2"], rel=0.02)


def test_a_frequency_shift_map_counts_k_once_and_q_never(files, capsys, tmp_path):
    # F' from a frequency shift involves k alone: with one calibration for the reference and the sample, k's
    # uncertainty cancels in the map as it does for two phase images (before, Q's NaN made the two calibrations
    # look different, both k uncertainties were added and a note said Q had no stated uncertainty)
    d, ref, sam = files
    f0 = 75e3
    for name, grad, lift in (("ref", ref.gradient_n_per_m, 20.0), ("sam", sam.gradient_n_per_m, 25.0)):
        np.savez(tmp_path / f"{name}_fm.npz", frequency_shift_hz=f0 * (np.sqrt(1.0 - grad / K_SPRING) - 1.0),
                 resonance_hz=f0, lift_nm=lift, pixel_nm=10.0, spring_constant_n_per_m=K_SPRING,
                 spring_constant_std_n_per_m=0.1 * K_SPRING)
    medians = {}
    for kind, tip_src, sample in (("phase", d / "ref.npz", d / "sample.npz"),
                                  ("frequency", tmp_path / "ref_fm.npz", tmp_path / "sam_fm.npz")):
        tip = tmp_path / f"{kind}_tip.npz"
        code, out, err = run(capsys, "analyze", "tip", str(tip_src), "--ms-ka-per-m", "600", "--thickness-nm", "12",
                             "--out", str(tip), "--json")
        assert code == 0, err
        code, out, err = run(capsys, "analyze", "field", str(sample), "--tip", str(tip), "--out",
                             str(tmp_path / f"{kind}_field.npz"), "--json")
        assert code == 0, err
        j = json.loads(out)
        assert not any("no stated uncertainty" in n for n in j["notes"]), j["notes"]
        medians[kind] = j["hz_std_median_a_per_m"]
    assert medians["frequency"] == pytest.approx(medians["phase"], rel=0.1)


def test_run_field_map_needs_a_probe_with_a_ttf(record_dir, capsys, tmp_path):
    # checked before anything moves
    code, out, err = run(capsys, "run", "--field-map", "--out", str(tmp_path / "o"))
    assert code == 2 and "--probe" in err
    code, out, err = run(capsys, "run", "--field-map", "--probe", "never-calibrated", "--out", str(tmp_path / "o"))
    assert code == 2 and "no TTF stored" in err and len(err.strip().splitlines()) == 1


def test_a_map_with_no_pixel_beyond_the_edge_margin_states_no_uncertainty(files, tip_file, capsys, tmp_path):
    # the map's uncertainty leaves out the reflection at the scan's edges; on an image no wider than four margins
    # that error reaches every pixel (measured on 48 px crops with a 43 px margin: rms error 17 kA/m against a
    # stated 1.8 kA/m), so no uncertainty is stated and the statistics say they include the edges
    d, _, sam = files
    np.savez(tmp_path / "small.npz", phase_deg=_phase(sam.gradient_n_per_m[:40, :40]), lift_nm=25.0, pixel_nm=10.0,
             spring_constant_n_per_m=K_SPRING, quality_factor=Q)
    argv = ["analyze", "field", str(tmp_path / "small.npz"), "--tip", str(tip_file[0]), "--out",
            str(tmp_path / "f.npz")]
    code, out, err = run(capsys, *argv, "--json")
    assert code == 0, err
    j = json.loads(out)
    assert j["hz_std_median_a_per_m"] is None and not j["statistics_beyond_margin"]
    assert any("small against the edge margin" in w for w in j["warnings"])
    code, out, err = run(capsys, *argv)
    assert "median uncertainty not stated" in out and "edges included" in out and "beyond a" not in out
    code, out, err = run(capsys, "analyze", "field", str(d / "sample.npz"), "--tip", str(tip_file[0]), "--out",
                         str(tmp_path / "g.npz"), "--json")
    j = json.loads(out)
    assert j["statistics_beyond_margin"] and j["hz_std_median_a_per_m"] > 0
