"""Which stored TTF may serve which image: same probe, no calibration between them, the image's own session
calibration accepted only when it found the probe unchanged (the probe record's change limits)."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from assistant.procedures.quantitative import check_tip
from assistant.procedures.quantitative_inputs import ImageInput, QuantitativeInputError
from assistant.storage.probe_record import ProbeRecord
from assistant.storage.quantitative_files import TipFile, utc_now_text

T0 = datetime(2026, 3, 1, 9, 0, tzinfo=timezone.utc)


def _image(probe=None, calibration=None):
    return ImageInput(source="x", gradient_n_per_m=np.zeros((16, 16)), pixel_m=(1e-8, 1e-8), lift_m=2e-8,
                      plane_m=2e-8, amplitude_m=None, spring_constant_n_per_m=2.8, quality_factor=200.0,
                      probe=probe, calibration=calibration)


def _cal(when, f0=75e3):
    return {"k_n_per_m": 2.8, "k_std_n_per_m": 0.05, "f0_hz": f0, "f0_std_hz": 2.0, "probe_name": "P",
            "calibrated_utc": when.isoformat()}


@pytest.fixture()
def setting(tmp_path):
    record = ProbeRecord(tmp_path)
    record.add("P", _cal(T0), now=T0)
    made = T0 + timedelta(hours=1)
    entry = {"calibration": _cal(T0), "created_utc": utc_now_text(made)}
    (tmp_path / "tip.npz").write_bytes(b"")
    record.add_tip_transfer("P", tmp_path / "tip.npz", entry, now=made)
    tip = TipFile(tmp_path / "tip.npz", {"probe": "P", "created_utc": utc_now_text(made)})
    return record, tip, made


def test_same_probe_no_calibration_since_is_accepted(setting):
    record, tip, _ = setting
    assert check_tip(tip, _image(), record) == []


def test_other_probe_is_refused(setting):
    record, tip, made = setting
    with pytest.raises(QuantitativeInputError, match="from probe 'P'.*probe 'Q'"):
        check_tip(tip, _image("Q", _cal(made + timedelta(hours=1))), record)


def test_calibration_after_the_ttf_refuses_a_file_image(setting):
    record, tip, made = setting
    record.add("P", _cal(made + timedelta(days=1)), now=made + timedelta(days=1))
    with pytest.raises(QuantitativeInputError, match="older than the probe's calibration"):
        check_tip(tip, _image(), record)


def test_own_session_calibration_unchanged_is_accepted(setting):
    record, tip, made = setting
    own = _cal(made + timedelta(days=1), f0=75e3 + 3.0)      # within the record's 0.5 % and 2-sigma limits
    record.add("P", own, now=made + timedelta(days=1))
    notes = check_tip(tip, _image("P", own), record)
    assert any("found unchanged" in n for n in notes)


def test_own_session_calibration_that_found_a_change_is_refused(setting):
    record, tip, made = setting
    own = _cal(made + timedelta(days=1), f0=74e3)             # 1.3 % lower: the probe changed
    record.add("P", own, now=made + timedelta(days=1))
    with pytest.raises(QuantitativeInputError, match="found the probe changed"):
        check_tip(tip, _image("P", own), record)


def test_calibration_between_ttf_and_session_is_refused(setting):
    record, tip, made = setting
    record.add("P", _cal(made + timedelta(hours=5)), now=made + timedelta(hours=5))
    own = _cal(made + timedelta(days=1))
    record.add("P", own, now=made + timedelta(days=1))
    with pytest.raises(QuantitativeInputError, match="older than the probe's calibration"):
        check_tip(tip, _image("P", own), record)


def test_ttf_made_without_a_calibration_cannot_be_judged_unchanged(tmp_path):
    record = ProbeRecord(tmp_path)
    made = T0
    (tmp_path / "tip.npz").write_bytes(b"")
    record.add_tip_transfer("P", tmp_path / "tip.npz", {"calibration": None, "created_utc": utc_now_text(made)},
                            now=made)
    tip = TipFile(tmp_path / "tip.npz", {"probe": "P", "created_utc": utc_now_text(made)})
    own = _cal(made + timedelta(days=1))
    record.add("P", own, now=made + timedelta(days=1))
    with pytest.raises(QuantitativeInputError, match="no calibration of the probe on record"):
        check_tip(tip, _image("P", own), record)
