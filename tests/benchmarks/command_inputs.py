"""Input files for the whole-process command benchmarks, each made from the published formulas of the tests.

``build(folder)`` writes them once (a marker file says they are complete) and returns their paths:

* ``series.npz``: 8 heights x 256 x 256 of a non-periodic crop with drift (tests/analysis/lift_series/synthetic_series.py);
* ``thermal.npy``: 2^24 float32 samples at 2 MHz of an oscillator spectrum plus white and 1/f background
  (the record of bench_thermal_fit);
* ``sweep.csv``: a driven damped oscillator's amplitude and phase, 201 points around 75 kHz;
* ``ref.npz`` and ``sample.npz``: 256 x 256 maze films seen through a point-probe tip
  (tests/analysis/quantitative/synthetic.py), as phase;
* ``loop.npz``: a field series of 161 steps x 128 x 128 of a dot array (tests/analysis/synthetic_loop.py);
* ``tracks.npz``: 512 x 512 recorded tracks (tests/analysis/media/synthetic_media.py).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
HEIGHTS_NM = np.array([20, 30, 40, 55, 70, 90, 110, 140], dtype=float)
THERMAL_RATE_HZ = 2e6
K_SPRING, Q = 2.8, 200.0
TIP = dict(moment_a_m2=1e-16, monopole_a_m=-3e-9, offset_m=30e-9)
VERSION = "1"  # change when an input changes, so a kept folder is rebuilt


def _phase(grad):
    return -np.degrees(np.arctan(Q * grad / K_SPRING))  # phase = -arctan(Q F'/k)


def _series(path: Path) -> None:
    from tests.analysis.lift_series.synthetic_series import build_series

    s = build_series(rows=256, cols=256, heights_m=HEIGHTS_NM * 1e-9, noise_deg=0.1, magnetic_scale=0.3, seed=1,
                     margin_px=64, drift_px=np.c_[np.linspace(0, 1.5, 8), np.linspace(0, -1.0, 8)])
    kw = s.analysis_kwargs
    np.savez(path, phase_deg=s.phase_deg, heights_nm=HEIGHTS_NM, pixel_nm=s.pixel_m * 1e9,
             spring_constant_n_per_m=kw["spring_constant_n_per_m"], quality_factor=kw["quality_factor"],
             tip_radius_nm=kw["tip_radius_m"] * 1e9, amplitude_nm=kw["amplitude_m"] * 1e9)


def _thermal(path: Path) -> None:
    sys.path.insert(0, str(Path(__file__).parent))
    from bench_thermal_fit import _record

    np.save(path, _record())


def _sweep(path: Path) -> None:
    # driven damped harmonic oscillator (any mechanics textbook), u = f / f0: amplitude
    # A0 / (Q sqrt((1 - u^2)^2 + (u/Q)^2)) (A0 at resonance), phase lag atan2(u/Q, 1 - u^2); plus a little noise
    f = np.linspace(74e3, 76e3, 201)
    u = f / 75e3
    amp = 0.02 / (Q * np.sqrt((1 - u * u) ** 2 + (u / Q) ** 2))
    lag = np.degrees(np.arctan2(u / Q, 1 - u * u))
    rng = np.random.default_rng(5)
    amp = amp * (1 + 2e-3 * rng.standard_normal(f.size))
    phase = 90.0 - lag - 5.0 + 0.05 * rng.standard_normal(f.size)
    path.write_text("frequency_hz,amplitude_v,phase_deg\n"
                    + "\n".join(f"{a:.6f},{b:.8e},{c:.6f}" for a, b, c in zip(f, amp, phase)) + "\n")


def _quantitative(ref_path: Path, sample_path: Path) -> None:
    from tests.analysis.quantitative.synthetic import make_image

    ref = make_image(n=256, oversample=2, pixel_m=10e-9, period_m=200e-9, ms=6e5, thickness_m=12e-9,
                     height_m=20e-9, noise_n_per_m=1e-4, seed=1, crop=(512, 85, 128), **TIP)
    sam = make_image(n=256, oversample=2, pixel_m=10e-9, period_m=350e-9, ms=9e5, thickness_m=20e-9,
                     height_m=30e-9, noise_n_per_m=1e-4, seed=101, crop=(512, 40, 90), **TIP)
    common = dict(pixel_nm=10.0, spring_constant_n_per_m=K_SPRING, quality_factor=Q)
    np.savez(ref_path, phase_deg=_phase(ref.gradient_n_per_m), lift_nm=20.0, **common)
    np.savez(sample_path, phase_deg=_phase(sam.gradient_n_per_m), lift_nm=30.0, **common)


def _loop(path: Path) -> None:
    sys.path.insert(0, str(ROOT / "tests" / "analysis"))
    from synthetic_loop import make_loop_stack

    down = np.linspace(400e3, -400e3, 81)
    fields = np.concatenate([down, down[-2::-1]])
    st = make_loop_stack(seed=1, rows=128, cols=128, fields=fields)
    np.savez(path, phase_deg=st.phase_deg, field_ka_per_m=st.field_a_per_m / 1e3, pixel_nm=20.0,
             topography_m=st.topography_m)


def _tracks(path: Path) -> None:
    from tests.analysis.media.synthetic_media import track_image

    im = track_image(rows=512, cols=512, seed=3, orientation="out-of-plane", bit_m=80e-9)
    np.savez(path, phase_deg=im.phase_deg, pixel_nm=im.pixel_m * 1e9, lift_nm=im.lift_m * 1e9)


def build(folder: Path) -> dict[str, Path]:
    """Write the inputs into ``folder`` unless a complete set of this version is there; their paths by name."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = {name: folder / name for name in ("series.npz", "thermal.npy", "sweep.csv", "ref.npz", "sample.npz",
                                              "loop.npz", "tracks.npz")}
    marker = folder / f"complete-{VERSION}"
    if not marker.exists():
        if str(ROOT) not in sys.path:
            sys.path.insert(0, str(ROOT))
        _series(paths["series.npz"])
        _thermal(paths["thermal.npy"])
        _sweep(paths["sweep.csv"])
        _quantitative(paths["ref.npz"], paths["sample.npz"])
        _loop(paths["loop.npz"])
        _tracks(paths["tracks.npz"])
        marker.write_text("")
    return {name.split(".")[0]: p for name, p in paths.items()}


if __name__ == "__main__":
    print(build(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("/tmp/mfma-bench-inputs")))
