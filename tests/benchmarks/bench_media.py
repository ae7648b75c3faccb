"""Recorded-track metrics of a 512 x 512 image (target: under 1 s, under 1 GiB), and the orientation alone.

Images from tests/analysis/media/synthetic_media.py (the charge formula, arctan transitions, random data, 3 nm
jitter): 80 nm bits at 8 nm pixels (8 tracks), both orientations, and 40 nm bits (more transitions per track).
Times are the minimum and the median of interleaved repeats (a shared two-core machine); peak memory is the
largest numpy/Python allocation traced during one analysis (tracemalloc), plus the image itself.
"""

from __future__ import annotations

import statistics
import time
import sys
import tracemalloc
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from assistant.analysis.media import analyse_tracks, magnetisation_orientation  # noqa: E402
from tests.analysis.media.synthetic_media import track_image  # noqa: E402
from timing import target  # noqa: E402

CASES = {"out-of-plane 80 nm": dict(orientation="out-of-plane", bit_m=80e-9),
         "in-plane 80 nm": dict(orientation="in-plane", bit_m=80e-9),
         "out-of-plane 40 nm": dict(orientation="out-of-plane", bit_m=40e-9)}


def run(repeats: int = 5) -> dict:
    images = {name: track_image(rows=512, cols=512, seed=3, **kw) for name, kw in CASES.items()}
    out: dict = {}
    times = {name: [] for name in images}
    for _ in range(repeats):
        for name, im in images.items():
            t0 = time.perf_counter()
            r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
            times[name].append(time.perf_counter() - t0)
    for name, im in images.items():
        tracemalloc.start()
        r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        t0 = time.perf_counter()
        magnetisation_orientation(im.phase_deg, pixel_m=im.pixel_m)
        t_orient = time.perf_counter() - t0
        out[name] = {"tracks_s_min": min(times[name]), "tracks_s_median": statistics.median(times[name]),
                     "orientation_s": t_orient, "peak_mib": (peak + im.phase_deg.nbytes) / 2**20,
                     "tracks": len(r.tracks), "transitions": sum(t.positions_m.size for t in r.tracks),
                     "bit_length_nm": r.bit_length_m * 1e9, "jitter_nm": r.transition_jitter_m * 1e9}
    out["target_met"] = all(v["tracks_s_median"] < 1.0 and v["peak_mib"] < 1024 for v in out.values()
                            if isinstance(v, dict))
    cases = [(name, v) for name, v in out.items() if isinstance(v, dict)]
    out["targets"] = ([target(f"track metrics 512^2, {name} (median of {repeats})", v["tracks_s_median"], 1.0, "s")
                       for name, v in cases]
                      + [target("track metrics 512^2: peak memory (largest case)", max(v["peak_mib"] for _, v in cases),
                                1024.0, "MiB")])
    return out
