"""Session-file write cost: one 256-pixel scan line at 7 lift heights, written and flushed, with and without fsync.

``run()`` returns per-line times (median, 90th percentile, max) in milliseconds, plus the cost of creating the
series (every chunk is allocated and NaN-filled up front) and the final file size.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from assistant.storage import SessionFile  # noqa: E402

PIXELS, HEIGHTS, LINES = 256, 7, 256


def _one(fsync: bool, folder: Path) -> dict[str, float]:
    rng = np.random.default_rng(0)
    path = folder / f"bench_{'fsync' if fsync else 'flush'}.h5"
    topo = rng.normal(0, 1e-9, (LINES, PIXELS))
    phase = rng.normal(0, 1, (LINES, HEIGHTS, PIXELS))
    amp = rng.normal(1, 0.01, (LINES, HEIGHTS, PIXELS))
    repeat = rng.normal(0, 1, (LINES, PIXELS))
    times = np.empty(LINES)
    with SessionFile.create(path, controller_url="sim://", software_version="bench", fsync=fsync) as s:
        t0 = time.perf_counter()
        w = s.create_series("s", heights_m=np.arange(1, HEIGHTS + 1) * 10e-9, biases_v=None, lines=LINES,
                            pixels=PIXELS, scan_size_m=5e-6, line_rate_hz=1.0, order="topography,heights",
                            repeat_first=True, settings_json="{}")
        create_ms = (time.perf_counter() - t0) * 1e3
        for i in range(LINES):
            t = time.perf_counter()
            w.write_line(i, topography_m=topo[i], phase_deg=phase[i], amplitude_v=amp[i],
                         repeat_phase_deg=repeat[i])
            times[i] = time.perf_counter() - t
    ms = times * 1e3
    return {"per_line_median_ms": float(np.median(ms)), "per_line_p90_ms": float(np.percentile(ms, 90)),
            "per_line_max_ms": float(ms.max()), "create_series_ms": create_ms,
            "file_mb": path.stat().st_size / 1e6}


def run() -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        return {"lines": LINES, "pixels": PIXELS, "heights": HEIGHTS,
                "flush_only": _one(False, folder), "flush_and_fsync": _one(True, folder)}


if __name__ == "__main__":
    import json

    print(json.dumps(run(), indent=2))
