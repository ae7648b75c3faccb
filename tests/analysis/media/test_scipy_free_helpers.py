"""The media family's small numpy stand-ins for scipy, checked against scipy itself (the reference library).

``mfma analyze image`` loads no scipy: loading scipy.ndimage and scipy.fft took 0.2 s of its 0.65 s (measured as
whole processes, tests/benchmarks/bench_commands.py). The stand-ins must give what scipy gives.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import fft as sp_fft
from scipy import ndimage

from assistant.analysis.media.track_layout import _gaussian_nearest, _runs
from assistant.analysis.media.transitions import next_fast_len


@pytest.mark.parametrize("sigma", [0.6, 1.0, 2.5])
@pytest.mark.parametrize("n", [1, 5, 37, 512])
def test_gaussian_smoothing_is_scipys(n, sigma):
    x = np.random.default_rng(n).normal(size=n) + np.linspace(0.0, 3.0, n)  # a slope: the edges matter
    want = ndimage.gaussian_filter1d(x, sigma, mode="nearest")
    np.testing.assert_allclose(_gaussian_nearest(x, sigma), want, rtol=0, atol=1e-14)


@pytest.mark.parametrize("seed", range(5))
def test_runs_are_the_labels_of_scipy(seed):
    mask = np.random.default_rng(seed).random(300) > 0.6
    mask[:3] = seed % 2 == 0  # runs that touch either end, or not
    mask[-3:] = seed % 3 == 0
    labels, n = ndimage.label(mask)
    want = [(int(np.flatnonzero(labels == i)[0]), int(np.flatnonzero(labels == i)[-1])) for i in range(1, n + 1)]
    assert _runs(mask) == want
    assert _runs(np.zeros(7, bool)) == [] and _runs(np.ones(7, bool)) == [(0, 6)]


def test_transform_lengths_are_scipys():
    assert [next_fast_len(n) for n in range(1, 3000)] == [sp_fft.next_fast_len(n) for n in range(1, 3000)]


def test_analyze_image_loads_no_scipy(tmp_path):
    import os
    import subprocess
    import sys
    from pathlib import Path

    from tests.analysis.media.synthetic_media import track_image

    im = track_image(orientation="out-of-plane", seed=5, rows=128, cols=256)
    path = tmp_path / "tracks.npz"
    np.savez(path, phase_deg=im.phase_deg, pixel_nm=im.pixel_m * 1e9, lift_nm=im.lift_m * 1e9)
    code = ("import sys, io, contextlib\n"
            "from assistant.cli import main\n"
            "with contextlib.redirect_stdout(io.StringIO()) as out:\n"
            "    assert main(['analyze', 'image', sys.argv[1], '--json']) == 0\n"
            "assert '\"tracks\"' in out.getvalue()\n"
            "print(sorted(m for m in sys.modules if m == 'scipy' or m.startswith('scipy.')))\n")
    root = Path(__file__).resolve().parents[3]
    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True, text=True, cwd=root,
                         check=True, env={**os.environ, "MFMA_DATA_DIR": str(tmp_path / "data")})
    assert out.stdout.strip().splitlines()[-1] == "[]", out.stdout + out.stderr
