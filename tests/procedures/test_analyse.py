"""Analyses of stored data: the probe model a stored series carries, its decomposition stored whole and read
back, the refit of a stored thermal spectrum, and the .npz stacks."""

from __future__ import annotations

import json

import numpy as np
import pytest

from assistant.analysis.lift_series import SeriesInputError, first_pass_gap_offset_m
from assistant.procedures import analyse
from assistant.procedures.workflow import Workflow
from assistant.storage import SessionFile
from tests.procedures.small_stage import QUICK_CALIBRATION, QUICK_SERIES, open_small


@pytest.fixture(scope="module")
def session_path(tmp_path_factory):
    path = tmp_path_factory.mktemp("analyse") / "s.h5"
    with open_small(seed=8) as ctl:
        wf = Workflow(ctl, path)
        try:
            wf.calibrate(QUICK_CALIBRATION)
            wf.approach()
            wf.series(QUICK_SERIES)
            wf.analyse()
        finally:
            wf.close()
    return path


def test_the_probe_of_a_stored_series():
    settings = {"drive": {"free_amplitude_m": 20e-9, "setpoint_ratio": 0.7, "frequency_hz": 75e3},
                "spring_constant_n_per_m": 2.8, "quality_factor": 200.0, "temperature_k": None}
    probe = analyse.stored_probe(settings, line_rate_hz=1.0, pixels=128)
    assert probe.amplitude_m == 20e-9 and probe.gap_offset_m == first_pass_gap_offset_m(20e-9, 0.7) == 14e-9
    # a 1 Hz line of 128 pixels: trace pixels of 1/256 s, noise bandwidth 1 / (2 dwell) = 128 Hz (it was 64 Hz;
    # see test_the_analysis_bandwidth_gives_the_thermal_limit_a_pass_meets)
    assert (probe.resonance_hz, probe.bandwidth_hz, probe.temperature_k) == (75e3, 128.0, 295.15)
    bare = analyse.stored_probe({})
    assert bare.spring_constant_n_per_m is None and bare.gap_offset_m is None and bare.bandwidth_hz is None


def test_the_stored_decomposition_comes_back_without_a_second_fit(session_path, monkeypatch):
    with SessionFile.open(session_path) as s:
        fresh = analyse.analyse_session_series(s, None, write=False)
        monkeypatch.setattr(analyse, "analyse_series", lambda *a, **k: pytest.fail("decomposed again"))
        stored = analyse.stored_series_analysis(s, "series1")
        with pytest.raises(SeriesInputError, match="no series 'nope'"):
            analyse.analyse_session_series(s, "nope")
    assert stored.to_dict() == fresh.to_dict()
    np.testing.assert_array_equal(stored.magnetic_deg, fresh.magnetic_deg)
    # the interaction regime is stored with the rest, its text notes too
    assert stored.interaction is not None and stored.interaction.regime == fresh.interaction.regime
    assert stored.interaction.notes == fresh.interaction.notes and isinstance(stored.interaction.notes, tuple)
    np.testing.assert_array_equal(stored.interaction.negligible_at, fresh.interaction.negligible_at)


def test_the_refit_of_the_stored_spectrum_is_the_calibrations_fit(session_path):
    with SessionFile.open(session_path) as s:
        record = s.read_calibrations()[-1]
    fit = analyse.stored_thermal_fit(record)
    assert fit.f0_hz == record.scalars["f0_hz"] and fit.q == record.scalars["q"]
    assert fit.spectrum is not None and fit.spectrum.n_segments == record.scalars["spectrum_segments"]


def test_npz_stacks_name_what_is_wrong(tmp_path):
    np.savez(tmp_path / "a.npz", phase_deg=np.zeros((3, 8, 8)), heights_nm=[10, 20, 40])
    with pytest.raises(SeriesInputError, match="missing key"):
        analyse.analyse_npz(tmp_path / "a.npz")
    np.savez(tmp_path / "b.npz", phase_deg=np.zeros((3, 8, 8)), heights_nm=[10, 20, 40], pixel_nm=5, colour=1)
    with pytest.raises(SeriesInputError, match="unknown key"):
        analyse.analyse_npz(tmp_path / "b.npz")
    np.savez(tmp_path / "c.npz", phase_deg=np.zeros((3, 8, 8)), heights_nm=[10, 20, 40], pixel_nm=[1, 2, 3])
    with pytest.raises(SeriesInputError, match="pixel_nm"):
        analyse.analyse_npz(tmp_path / "c.npz")
    (tmp_path / "d.npz").write_text("not a zip")
    with pytest.raises(SeriesInputError, match="not a readable"):
        analyse.analyse_npz(tmp_path / "d.npz")


def test_storage_form_keeps_numbers_and_drops_text_lists():
    scalars, arrays = analyse.storage_form({"a_deg": [1.0, 2.0], "ok": True, "n": 3, "s": "x", "none": None,
                                             "mixed": [1.0, None], "words": ["a"], "no_notes": []})
    assert scalars == {"ok": 1, "n": 3, "s": "x"} and list(arrays) == ["a_deg"]
    assert json.dumps(scalars)
