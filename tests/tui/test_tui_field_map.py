"""The terminal UI's field-map step on an opened session file: the probe's stored TTF maps the field and the
Analysis view says so (synthetic images from the analytic point-probe TTF; headless at 80 x 24)."""

from __future__ import annotations

import asyncio
import json

import numpy as np

from assistant.procedures.quantitative import calibrate_tip_file
from assistant.storage.probe_record import ProbeRecord
from assistant.storage.session_file import SessionFile
from assistant.tui.app import MfmApp
from tests.analysis.quantitative.synthetic import make_image

TIP = dict(moment_a_m2=1e-16, monopole_a_m=-3e-9, offset_m=30e-9)


def _session(path, probe: str) -> None:
    sam = make_image(n=96, oversample=2, pixel_m=10e-9, period_m=300e-9, ms=9e5, thickness_m=20e-9, height_m=20e-9,
                     noise_n_per_m=1e-4, seed=4, crop=(192, 30, 20), **TIP)
    phase = -np.degrees(np.arctan(200.0 * sam.gradient_n_per_m / 2.8))
    with SessionFile.create(path, controller_url="sim://", software_version="test") as sf:
        sf.write_calibration({"probe_name": probe, "k_n_per_m": 2.8, "f0_hz": 75e3, "q": 200.0,
                              "calibrated_utc": "2020-01-01T00:00:00+00:00"})
        w = sf.create_series("series1", heights_m=[20e-9], biases_v=None, lines=96, pixels=96, scan_size_m=96e-8,
                             line_rate_hz=1.0, order="test", repeat_first=False,
                             settings_json=json.dumps({"spring_constant_n_per_m": 2.8, "quality_factor": 200.0}))
        for i in range(96):
            w.write_line(i, topography_m=np.zeros(96), phase_deg=phase[None, i], amplitude_v=np.zeros((1, 96)))


def test_field_map_button_maps_an_opened_session(tmp_path):
    record = ProbeRecord(tmp_path / "record")
    ref = make_image(n=96, oversample=2, pixel_m=10e-9, period_m=200e-9, ms=6e5, thickness_m=12e-9, height_m=20e-9,
                     noise_n_per_m=1e-4, seed=3, crop=(192, 40, 70), **TIP)
    np.savez(tmp_path / "ref.npz", phase_deg=-np.degrees(np.arctan(200.0 * ref.gradient_n_per_m / 2.8)),
             lift_nm=20.0, pixel_nm=10.0, spring_constant_n_per_m=2.8, quality_factor=200.0)
    calibrate_tip_file(tmp_path / "ref.npz", ms_a_per_m=6e5, thickness_m=12e-9, out=tmp_path / "tip.npz",
                       probe="lever-Q", record=record)
    path = tmp_path / "s.h5"
    _session(path, "lever-Q")

    async def go():
        app = MfmApp(None, open_path=path, probe_record=record)
        async with app.run_test(size=(80, 24)) as pilot:
            await pilot.pause(0.3)
            await pilot.press("5")
            await pilot.click("#fieldmap")
            for _ in range(200):
                await pilot.pause(0.05)
                if app.view("analysis").field_map is not None:
                    break
            text = app.view("analysis")._text()
            await pilot.press("q")
        return text

    text = asyncio.run(go())
    assert "field map: μ0 Hz rms" in text
    with SessionFile.open(path, "r") as sf:                # opened read-only: the file is left as it was
        assert sf.field_map_names() == []
    from assistant.outputs import report_dir_for

    with np.load(report_dir_for(path) / "field_map.npz") as z:
        assert z["hz_a_per_m"].shape == (96, 96)
    assert (report_dir_for(path) / "field_map.png").is_file()
