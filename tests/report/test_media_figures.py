"""The media figures show what the summary reports: the jitter histogram holds exactly the deviations the
reported jitter was computed from (images from tests/analysis/media/synthetic_media.py)."""

from __future__ import annotations

import numpy as np
import pytest

from assistant.analysis.media import analyse_tracks
from assistant.report.media_figures import jitter_histogram_figure
from tests.analysis.media.synthetic_media import track_image


def test_the_jitter_histogram_holds_the_transitions_of_the_reported_jitter():
    # at five times the default noise, transitions placed where there are none lie within 30 % of a cell of the
    # grid but beyond four robust standard deviations: the jitter leaves them out, and so must the histogram (seed 0
    # had two until the pairs the fit made up within a pixel were taken out, and then none; seed 4 has one)
    im = track_image(orientation="out-of-plane", seed=4, noise_deg=0.1)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    on_grid = sum(int(np.sum(~t.off_grid)) for t in r.tracks if t.off_grid is not None and np.isfinite(
        t.deviations_m).all())
    used = [t.deviations_m[t.in_jitter] for t in r.tracks]
    n_used = sum(u.size for u in used)
    assert 0 < n_used < on_grid  # the robust cut left some on-grid transitions out in this image
    # the shown deviations give the reported raw jitter (two grid parameters per track out of the dof)
    dof = sum(max(u.size - 2, 1) for u in used if u.size)
    raw = np.sqrt(np.sum(np.concatenate(used) ** 2) / dof)
    assert raw == pytest.approx(r.jitter_raw_m, rel=1e-9)
    fig = jitter_histogram_figure(r)
    ax = fig.axes[0]
    assert sum(p.get_height() for p in ax.patches) == n_used
    assert f"{n_used} transitions" in [t.get_text() for t in ax.get_legend().get_texts()]
