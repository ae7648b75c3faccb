"""The written-track layout of the simulated stage: what the recorded-tracks scenarios promise is in the film's
magnetisation map (the stage checked against its own scenario text; the analysis meets the layout in
tests/cli/test_analyze_image_cli.py). The arctan transition is Williams & Comstock 1971 (AIP Conf. Proc. 5, 738;
from memory): the magnetisation crosses zero at the transition and reaches half its swing at x0 +- a."""

from __future__ import annotations

import numpy as np
import pytest

from simulated_stage.errors import ScenarioError
from simulated_stage.recording import TrackLayout, written_tracks
from simulated_stage.sample import SampleSpec
from simulated_stage.scenario import load_scenario


def test_layout_tracks_erase_bands_and_old_data():
    lay = TrackLayout(bit_m=100e-9, pitch_m=600e-9, width_m=440e-9, jitter_m=0.0, erase_m=40e-9, old_bit_m=160e-9)
    px = 5e-9
    m, mask = written_tracks(480, px, lay, transition_m=2e-9, shape="arctan", rng=np.random.default_rng(1))
    y = (np.arange(480) + 0.5) * px - 240 * px
    # tracks centred at y = (j + 1/2) pitch: the one at 300 nm spans 440 nm of rows
    band = np.flatnonzero((mask[:, 0] > 0) & (np.abs(y - 300e-9) < 300e-9))
    assert 0.5 * (y[band[0]] + y[band[-1]]) == pytest.approx(300e-9, abs=px)
    assert (band[-1] - band[0] + 1) * px == pytest.approx(440e-9, abs=px)
    # the erase bands beside it are DC-erased: +1 everywhere along x; old data beyond them
    erase = np.abs(np.abs(y - 300e-9) - 240e-9) < 15e-9
    assert np.all(m[erase] == 1.0)
    old = np.abs(y - 600e-9) < 30e-9
    assert np.any(m[old] < 0)
    # random data in the track: transitions sit on the 100 nm grid (no jitter) as zero crossings
    row = m[band[len(band) // 2]]
    x = (np.arange(480) + 0.5) * px - 240 * px
    crossings = x[:-1][np.sign(row[1:]) != np.sign(row[:-1])]
    offsets = np.mod(crossings - crossings[0] + 50e-9, 100e-9) - 50e-9
    assert crossings.size > 4 and np.max(np.abs(offsets)) < px


def test_jitter_moves_transitions_by_its_rms():
    lay = TrackLayout(bit_m=100e-9, pitch_m=1e-6, width_m=900e-9, jitter_m=5e-9)
    m, _ = written_tracks(1200, 4e-9, lay, transition_m=1e-9, shape="tanh", rng=np.random.default_rng(2))
    x = (np.arange(1200) + 0.5) * 4e-9 - 2.4e-6
    row = m[600 + 125]  # y = 0.5 um, the middle of the track at pitch / 2
    i = np.flatnonzero(np.sign(row[1:]) != np.sign(row[:-1]))
    t = x[i] + 4e-9 * row[i] / (row[i] - row[i + 1])  # linear interpolation of the zero crossing
    cells = np.rint((t - t[0]) / 100e-9)
    coef = np.polyfit(cells, t, 1)
    assert coef[0] == pytest.approx(100e-9, rel=0.005)
    assert np.std(t - np.polyval(coef, cells)) == pytest.approx(5e-9, rel=0.35)  # ~24 transitions


def test_scenarios_carry_the_layout():
    for name, axis in (("recorded-tracks", "z"), ("recorded-tracks-inplane", "x")):
        sc = load_scenario(name)
        lay = sc.sample.track_layout()
        assert (lay.bit_m, lay.pitch_m, lay.jitter_m) == pytest.approx((100e-9, 600e-9, 4e-9))
        assert sc.sample.pattern == ("oop_tracks" if axis == "z" else "inplane_bits")
    assert load_scenario("default").sample.track_layout() is None  # the old layout stays


@pytest.mark.parametrize("table, needle", [
    ({"track_pitch_nm": 500.0}, "needs bit_length_nm"),
    ({"pattern": "dots", "bit_length_nm": 100.0, "track_pitch_nm": 600.0, "track_width_nm": 400.0}, "applies to"),
    ({"bit_length_nm": 100.0, "track_pitch_nm": 600.0, "track_width_nm": 700.0}, "track_width_nm"),
    ({"bit_length_nm": 100.0, "track_pitch_nm": 600.0, "track_width_nm": 400.0, "jitter_nm": 40.0}, "jitter_nm"),
])
def test_bad_layouts_name_the_key(table, needle):
    with pytest.raises(ScenarioError, match=needle):
        SampleSpec.from_table(table)
