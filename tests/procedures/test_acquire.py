"""Raw acquisitions: the checks of a thermal record request, the sweep (native and point by point) and the
streamed .npy writer."""

from __future__ import annotations

import numpy as np
import pytest

from assistant.procedures.acquire import (AcquisitionError, check_thermal_settings, drive_sweep, frequency_grid,
                                          thermal_chunks, write_npy_stream)
from assistant.procedures.events import CancelToken, Cancelled
from drivers.base import Capability
from drivers.errors import ProtocolError
from tests.procedures.small_stage import open_small


def test_thermal_settings_name_what_is_wrong():
    with open_small() as ctl:
        with pytest.raises(AcquisitionError, match="must be positive"):
            check_thermal_settings(ctl, seconds=0.0, rate_hz=1e6)
        with pytest.raises(AcquisitionError, match="exceeds the controller's maximum"):
            check_thermal_settings(ctl, seconds=0.1, rate_hz=1e9)
        with pytest.raises(AcquisitionError, match="Nyquist"):  # the probe's nominal f0 is 75 kHz
            check_thermal_settings(ctl, seconds=0.1, rate_hz=1e5)
        with pytest.raises(AcquisitionError, match="too few"):
            check_thermal_settings(ctl, seconds=1e-4, rate_hz=1e6)
        assert check_thermal_settings(ctl, seconds=0.01, rate_hz=1e6) == 10_000
    with pytest.raises(AcquisitionError, match="below stop"):
        frequency_grid(80e3, 70e3, 11)
    np.testing.assert_allclose(frequency_grid(70e3, 80e3, 11), np.arange(70e3, 80.1e3, 1e3))


def test_thermal_record_streams_the_free_lever_and_stops_on_cancel(tmp_path):
    with open_small(seed=2) as ctl:
        events = []
        written = write_npy_stream(tmp_path / "t.npy", thermal_chunks(ctl, seconds=0.02, rate_hz=1e6,
                                                                      sink=events.append), 20_000)
        assert written == 20_000 and np.load(tmp_path / "t.npy").shape == (20_000,)
        assert events[-1].done == pytest.approx(0.02) and events[-1].unit == "s"
        token = CancelToken()
        token.set()
        with pytest.raises(Cancelled):
            list(thermal_chunks(ctl, seconds=0.02, rate_hz=1e6, cancel=token))
        assert ctl.status().safe
    with pytest.raises(ProtocolError, match="10 were requested"):
        write_npy_stream(tmp_path / "u.npy", iter([np.zeros(4)]), 10)


def test_point_by_point_sweep_follows_the_native_one():
    freqs = np.linspace(74.5e3, 75.5e3, 21)
    with open_small(seed=5) as ctl:
        native = drive_sweep(ctl, freqs, 0.1)
        assert ctl.status().safe  # withdrawn, drive off
    with open_small(seed=5) as ctl:
        ctl.capabilities = frozenset(ctl.capabilities - {Capability.DRIVE_SWEEP})
        events = []
        fallback = drive_sweep(ctl, freqs, 0.1, sink=events.append)
        assert len(events) == freqs.size and ctl.status().safe
    # the same driven lever, read one point at a time: the peak is at the same frequency (within one step), the
    # amplitudes agree within the lock-in noise (a few per cent of the peak at 10 nm of free amplitude)
    assert abs(int(np.argmax(fallback.amplitude_v)) - int(np.argmax(native.amplitude_v))) <= 1
    np.testing.assert_allclose(fallback.amplitude_v, native.amplitude_v, atol=0.05 * native.amplitude_v.max())
