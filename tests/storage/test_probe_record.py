"""Probe record: history across sessions, atomic JSON writes, warnings when k or f0 moved."""

from __future__ import annotations

import json
import os
from datetime import datetime, timezone

import pytest

from assistant.storage import ProbeRecord, ProbeRecordError, default_data_dir

T1 = datetime(2026, 5, 1, 9, 0, tzinfo=timezone.utc)
T2 = datetime(2026, 5, 8, 9, 0, tzinfo=timezone.utc)
BASE = {"k_n_per_m": 2.80, "k_std_n_per_m": 0.08, "f0_hz": 75_000.0, "f0_std_hz": 2.0, "q": 210.0,
        "method": "thermal"}


def test_env_var_chooses_the_data_folder(tmp_path, monkeypatch):
    monkeypatch.setenv("MFMA_DATA_DIR", str(tmp_path / "d"))
    assert default_data_dir() == tmp_path / "d"
    record = ProbeRecord()
    record.add("lever-A", BASE, now=T1)
    assert (tmp_path / "d" / "probe_record.json").is_file()
    monkeypatch.delenv("MFMA_DATA_DIR")
    assert "mfm-assistant" in str(default_data_dir())


def test_history_names_and_no_warning_within_uncertainty(tmp_path):
    record = ProbeRecord(tmp_path)
    assert record.add("lever-A", BASE, now=T1) == []
    # k 1.4 % and f0 0.01 % lower: within both the combined uncertainty and the floors
    assert record.add("lever-A", {**BASE, "k_n_per_m": 2.76, "f0_hz": 74_992.0}, now=T2) == []
    record.add("lever-B", {"f0_hz": 13_000.0}, now=T2)
    assert record.names() == ["lever-A", "lever-B"]
    history = record.history("lever-A")
    assert [h["k_n_per_m"] for h in history] == [2.80, 2.76]
    assert history[0]["recorded_utc"] == "2026-05-01T09:00:00Z"
    assert record.history("unknown") == []
    doc = json.loads((tmp_path / "probe_record.json").read_text())
    assert doc["format"] == "mfm-assistant-probe-record" and doc["version"] == 1


def test_k_change_beyond_combined_uncertainty_warns(tmp_path):
    record = ProbeRecord(tmp_path)
    record.add("lever-A", BASE, now=T1)
    # 2.80 -> 2.40 N/m: change 0.40, combined SD hypot(0.08, 0.08) = 0.113, i.e. 3.5 SD and 14 %
    warnings = record.add("lever-A", {**BASE, "k_n_per_m": 2.40}, now=T2)
    assert len(warnings) == 1
    assert "k moved from 2.8 to 2.4 N/m (-14.29 %, 3.5 times the combined uncertainty 0.113 N/m)" in warnings[0]
    assert "2026-05-01T09:00:00Z" in warnings[0]


def test_large_relative_change_inside_big_uncertainty_is_quiet(tmp_path):
    record = ProbeRecord(tmp_path)
    noisy = {**BASE, "k_std_n_per_m": 0.5}
    record.add("lever-A", noisy, now=T1)
    # 11 % change but combined SD 0.71 N/m: not significant
    assert record.add("lever-A", {**noisy, "k_n_per_m": 3.10}, now=T2) == []


def test_small_significant_change_below_floor_is_quiet_and_f0_drop_names_contamination(tmp_path):
    record = ProbeRecord(tmp_path)
    record.add("lever-A", BASE, now=T1)
    # f0 down 30 Hz (0.04 %): 10.6 combined SD, yet below the 0.5 % floor (temperature drift class)
    assert record.add("lever-A", {**BASE, "f0_hz": 74_970.0}, now=T2) == []
    warnings = record.add("lever-A", {**BASE, "f0_hz": 74_000.0}, now=T2)
    assert len(warnings) == 1 and "f0 moved" in warnings[0] and "contamination" in warnings[0]
    warnings = record.add("lever-A", {**BASE, "f0_hz": 75_000.0}, now=T2)
    assert "wear" in warnings[0]


def test_floor_alone_without_uncertainties(tmp_path):
    record = ProbeRecord(tmp_path)
    record.add("p", {"k_n_per_m": 1.0}, now=T1)
    assert record.add("p", {"k_n_per_m": 1.02}, now=T2) == []
    warnings = record.add("p", {"k_n_per_m": 1.06}, now=T2)  # 3.9 % above the last (1.02)
    assert len(warnings) == 1 and "no uncertainty known" in warnings[0]


def test_atomic_write_leaves_no_temporary_files_and_keeps_old_record_on_failure(tmp_path, monkeypatch):
    record = ProbeRecord(tmp_path)
    record.add("p", BASE, now=T1)
    before = (tmp_path / "probe_record.json").read_bytes()

    def failing_replace(src, dst):
        raise OSError(28, "No space left on device (injected)")

    monkeypatch.setattr(os, "replace", failing_replace)
    with pytest.raises(OSError):
        record.add("p", {**BASE, "k_n_per_m": 2.5}, now=T2)
    assert (tmp_path / "probe_record.json").read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["probe_record.json"]


def test_bad_input_and_corrupt_file(tmp_path):
    record = ProbeRecord(tmp_path)
    with pytest.raises(ProbeRecordError, match="probe name"):
        record.add("  ", BASE)
    with pytest.raises(ProbeRecordError, match="neither a finite k_n_per_m nor f0_hz"):
        record.add("p", {"q": 200.0})
    with pytest.raises(ProbeRecordError, match="not plain JSON"):
        record.add("p", {"k_n_per_m": 2.0, "when": object()})
    (tmp_path / "probe_record.json").write_text("{broken")
    with pytest.raises(ProbeRecordError, match="cannot be read"):
        record.names()
    (tmp_path / "probe_record.json").write_text('{"format": "other"}')
    with pytest.raises(ProbeRecordError, match="not a probe record"):
        record.history("p")


def test_numpy_scalars_and_nan_are_stored_as_plain_json(tmp_path):
    import numpy as np

    record = ProbeRecord(tmp_path)
    record.add("p", {"k_n_per_m": np.float64(2.5), "segments": np.int64(10), "invols_std_nm_per_v": float("nan")},
               now=T1)
    entry = record.history("p")[0]
    assert entry["k_n_per_m"] == 2.5 and entry["segments"] == 10 and entry["invols_std_nm_per_v"] is None
