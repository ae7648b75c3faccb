"""``mfma analyze image`` as a user runs it (in-process): the JSON contract on images built in the tests from the
published field formula (tests/analysis/media/synthetic_media.py), null metrics without tracks, exit 2 with the
needed pixel size when bits are too short for the pixels, and a session file from the simulated stage's
recorded-tracks scenario (its written layout, [sample] in simulated_stage/scenarios/recorded-tracks.toml: 100 nm
bits, 600 nm pitch, 4 nm jitter, is what the metrics must find)."""

from __future__ import annotations

import json
import numpy as np
import pytest

from assistant.cli import main
from tests.analysis.media.synthetic_media import domain_image, track_image

KEYS = ("orientation", "orientation_confidence", "bit_length_nm", "bit_length_std_nm", "track_pitch_nm",
        "track_width_nm", "transition_jitter_nm", "transition_width_nm", "tracks", "transitions")


def run(capsys, *argv):
    code = main(list(argv))
    out = capsys.readouterr()
    return code, out.out, out.err


def test_json_contract_on_synthetic_tracks(tmp_path, capsys):
    im = track_image(orientation="in-plane", seed=41, rows=192)
    path = tmp_path / "tracks.npz"
    np.savez(path, phase_deg=im.phase_deg, pixel_nm=im.pixel_m * 1e9, lift_nm=im.lift_m * 1e9)
    code, out, err = run(capsys, "analyze", "image", str(path), "--json")
    assert code == 0, err
    d = json.loads(out)
    assert all(k in d for k in KEYS)
    assert d["orientation"] == "in-plane"
    assert d["bit_length_nm"] == pytest.approx(80.0, rel=0.02)
    assert d["track_pitch_nm"] == pytest.approx(500.0, rel=0.03)
    assert d["image"]["lift_nm"] == pytest.approx(20.0)
    code, out, _ = run(capsys, "analyze", "image", str(path))  # the text form
    assert code == 0 and "bit length:" in out and "jitter:" in out


def test_image_without_tracks_gives_null_metrics(tmp_path, capsys):
    path = tmp_path / "domains.npz"
    np.savez(path, phase_deg=domain_image(seed=42, rows=128, cols=128).phase_deg, pixel_nm=10.0)
    code, out, err = run(capsys, "analyze", "image", str(path), "--json")
    assert code == 0, err
    d = json.loads(out)
    assert d["orientation"] in ("out-of-plane", "undetermined")
    assert all(d[k] is None for k in KEYS[2:])
    assert "No recorded tracks" in d["summary"]


def test_too_few_pixels_per_bit_is_exit_2_naming_the_pixel_size(tmp_path, capsys):
    im = track_image(bit_m=80e-9, pixel_m=24e-9, rows=128, cols=128, seed=28)
    path = tmp_path / "coarse.npz"
    np.savez(path, phase_deg=im.phase_deg, pixel_nm=24.0)
    code, out, err = run(capsys, "analyze", "image", str(path), "--json")
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and "pixels of at most" in err and "nm" in err


@pytest.mark.parametrize("data, needle", [
    ({"phase_deg": np.zeros((3, 32, 32)), "pixel_nm": 10.0}, "one image"),
    ({"phase_deg": np.zeros((32, 32))}, "pixel_nm"),
    ({"phase_deg": np.zeros((32, 32)), "pixel_nm": 10.0, "colour": 1}, "unknown key"),
    ({"phase_deg": np.zeros((32, 32)), "pixel_nm": -1.0}, "positive"),
    ({"phase_deg": np.zeros((32, 32)), "pixel_nm": 10.0, "lift_nm": [20.0, 30.0]}, "lift_nm must be one number"),
    ({"phase_deg": np.zeros((32, 32)), "pixel_nm": 10.0, "lift_nm": "high"}, "lift_nm must be one number"),
    ({"phase_deg": np.full((32, 32), np.inf), "pixel_nm": 10.0}, "not finite (100% infinite)"),
    ({"phase_deg": np.full((32, 32), np.nan), "pixel_nm": 10.0}, "not finite (100% NaN)"),
])
def test_bad_files_are_one_line_exit_2(tmp_path, capsys, data, needle):
    path = tmp_path / "bad.npz"
    np.savez(path, **data)
    code, _, err = run(capsys, "analyze", "image", str(path))
    assert code == 2 and needle in err and err.count("\n") == 1


@pytest.mark.parametrize("option, value, needle", [("--thickness-nm", "0", "must be > 0 nm"),
                                                   ("--thickness-nm", "-5", "must be > 0 nm"),
                                                   ("--tip-offset-nm", "-1", "must be >= 0 nm")])
def test_bad_options_are_one_line_exit_2(tmp_path, capsys, option, value, needle):
    path = tmp_path / "flat.npz"
    np.savez(path, phase_deg=np.zeros((32, 32)), pixel_nm=10.0)
    code, out, err = run(capsys, "analyze", "image", str(path), option, value)
    assert code == 2 and out == "" and needle in err and err.count("\n") == 1


def test_missing_file(capsys, tmp_path):
    code, _, err = run(capsys, "analyze", "image", str(tmp_path / "nope.npz"))
    assert code == 2 and "not found" in err


@pytest.fixture(scope="module")
def stage_session(tmp_path_factory):
    from assistant.procedures.calibrate import CalibrationSettings
    from assistant.procedures.series import SeriesSettings
    from assistant.procedures.workflow import Workflow
    from drivers.registry import open_controller

    path = tmp_path_factory.mktemp("media") / "session.h5"
    with open_controller("sim://", scenario="recorded-tracks", seed=2) as ctl:
        wf = Workflow(ctl, path)
        try:
            wf.calibrate(CalibrationSettings(temperature_k=298.15, thermal_seconds=0.5))
            wf.approach()
            # 1.6 um, 12.5 nm along the lines (8 px per bit), 25 nm between lines (the 40 nm erase bands and
            # the old data between tracks need them), three heights at the contact potential
            wf.series(SeriesSettings(heights_m=(15e-9, 25e-9, 40e-9), bias_v=0.25, lines=64, pixels=128,
                                     scan_size_m=1.6e-6))
            wf.analyse()
        finally:
            wf.close()
    return path


def test_session_file_on_the_recorded_tracks_scenario(stage_session, capsys):
    code, out, err = run(capsys, "analyze", "image", str(stage_session), "--json")
    assert code == 0, err
    d = json.loads(out)
    assert d["orientation"] == "out-of-plane"
    assert d["bit_length_nm"] == pytest.approx(100.0, rel=0.02)
    assert d["track_pitch_nm"] == pytest.approx(600.0, rel=0.03)
    assert 2.0 < d["transition_jitter_nm"] < 8.0  # written 4 nm; a handful of transitions per track here
    assert "series 'series1'" in d["image"]["source"]
    code, _, err = run(capsys, "analyze", "image", str(stage_session), "--height-nm", "33")
    assert code == 2 and "no height 33 nm" in err


def test_report_media_section(stage_session, tmp_path):
    # the section build_report adds: its text and both figures (the whole report of a run is checked in
    # tests/cli/test_run_e2e.py)
    from assistant.report.media_report import media_section

    notes = []
    lines, paths = media_section(stage_session, tmp_path, notes)
    text = "\n".join(lines)
    assert not notes and "## Media: orientation and recorded tracks" in text and "| bit length |" in text
    assert sorted(p.name for p in paths) == ["media_jitter_histogram.png", "media_transition_map.png"]
    assert all(p.stat().st_size > 10_000 for p in paths)


def test_the_oscillation_amplitude_from_the_file_or_the_option(tmp_path, capsys):
    # an image made with the oscillation's averaging (A = 20 nm, written a = 15 nm; synthetic_media.py): the
    # width reads the written a with the amplitude given in the file or on the command line, ~+17 nm without
    im = track_image(orientation="in-plane", transition_a_m=15e-9, seed=25, rows=160, amplitude_m=20e-9)
    bare, given = tmp_path / "bare.npz", tmp_path / "given.npz"
    np.savez(bare, phase_deg=im.phase_deg, pixel_nm=8.0, lift_nm=20.0)
    np.savez(given, phase_deg=im.phase_deg, pixel_nm=8.0, lift_nm=20.0, amplitude_nm=20.0)
    tip = ("--thickness-nm", "15", "--tip-offset-nm", "30", "--json")
    widths = {}
    for name, argv in (("bare", (str(bare),)), ("file", (str(given),)),
                       ("option", (str(bare), "--amplitude-nm", "20"))):
        code, out, err = run(capsys, "analyze", "image", *argv, *tip)
        assert code == 0, err
        d = json.loads(out)
        widths[name] = d["transition_width_nm"]
        assert d["transition_width_includes_oscillation"] == (name == "bare")
        assert d["image"]["closest_approach_nm"] == pytest.approx(20.0)  # gap offset = amplitude: the lift
    assert widths["bare"] > 25.0
    assert widths["file"] == pytest.approx(15.0, abs=1.5) and widths["option"] == pytest.approx(widths["file"])
    np.savez(given, phase_deg=im.phase_deg, pixel_nm=8.0, lift_nm=10.0, amplitude_nm=20.0, gap_offset_nm=5.0)
    code, _, err = run(capsys, "analyze", "image", str(given))
    assert code == 2 and "closest approach" in err and err.count("\n") == 1
