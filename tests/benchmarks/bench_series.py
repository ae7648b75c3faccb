"""A lift-height series on the simulated stage in fast mode, storage included (target: 256 lines x 256 pixels x
7 heights within 30 s on two cores; per-line write and flush well under a millisecond)."""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

from assistant.procedures.approach import ApproachSettings, approach
from assistant.procedures.series import SeriesSettings, run_series
from assistant.storage.session_file import SessionFile
from drivers.registry import open_controller


class TimedWriter:
    def __init__(self, writer) -> None:
        self.writer, self.times = writer, []

    @property
    def completed_lines(self) -> int:
        return self.writer.completed_lines

    def write_line(self, *args, **kwargs) -> None:
        t0 = time.perf_counter()
        self.writer.write_line(*args, **kwargs)
        self.times.append(time.perf_counter() - t0)


def run(lines: int = 256, pixels: int = 256) -> dict:
    settings = SeriesSettings(lines=lines, pixels=pixels, scan_size_m=4e-6, repeat_first=False)
    with open_controller("sim://", seed=1) as ctl, tempfile.TemporaryDirectory() as tmp:
        ctl.set_drive(75e3, 0.2)
        free = ctl.read(["amplitude_v"])["amplitude_v"]
        approach(ctl, ApproachSettings(75e3, 0.2, 0.7 * free, free))
        with SessionFile.create(Path(tmp) / "b.h5", controller_url="sim://", software_version="bench") as sf:
            w = TimedWriter(sf.create_series("b", heights_m=settings.heights_m, biases_v=None, lines=lines,
                                             pixels=pixels, scan_size_m=settings.scan_size_m, line_rate_hz=1.0,
                                             order=settings.order, repeat_first=False,
                                             settings_json=settings.to_json()))
            t0 = time.perf_counter()
            run_series(ctl, settings, w)
            total = time.perf_counter() - t0
    w.times.sort()
    return {"lines": lines, "pixels": pixels, "heights": len(settings.heights_m), "series_s": total,
            "target_s": 30.0, "write_flush_median_ms": 1e3 * w.times[len(w.times) // 2],
            "write_flush_p95_ms": 1e3 * w.times[int(0.95 * len(w.times))]}
