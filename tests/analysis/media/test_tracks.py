"""Recorded-track metrics on images built in the tests from the published physics (synthetic_media.py: the charge
formula H_z(k, z) = 1/2 e^(-kz)(1 - e^(-kt))[M_z - i k.M/k], Hug et al. 1998, J. Appl. Phys. 83, 5609, from
memory; Williams-Comstock arctan transitions, Williams & Comstock 1971, AIP Conf. Proc. 5, 738, from memory;
random data; Gaussian jitter; a point-dipole tip, Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53).

Tolerances from the task: bit length within 2 %, pitch within 3 %, jitter within a factor 2 at bit lengths near
the resolution limit and better where bits are long. Near the limit here: 24 nm bits against an image response
w = lift + transition parameter + tip offset = 55 nm (bits shorter than half the response width).
"""

from __future__ import annotations

import numpy as np
import pytest

from assistant.analysis.media import TooFewPixelsPerBitError, analyse_tracks, point_probe_transfer
from tests.analysis.media.synthetic_media import domain_image, track_image


def _matched_errors(result, image):
    """Fitted minus true position of every reported transition, per track matched by centre [m]."""
    errs = []
    for t in result.tracks:
        truth = image.transitions[int(np.argmin(np.abs(image.track_centres_m - t.centre_m)))]
        for x in t.positions_m:
            errs.append(x - truth[np.argmin(np.abs(truth - x))])
    return np.array(errs)


def _sample_jitter(result, image):
    """rms deviation of the true transition positions from the grids the analysis fitted (J - 2 per track)."""
    dev, dof = [], 0
    for t in result.tracks:
        truth = image.transitions[int(np.argmin(np.abs(image.track_centres_m - t.centre_m)))]
        sel = truth[(truth >= t.positions_m.min() - 1e-9) & (truth <= t.positions_m.max() + 1e-9)]
        grid = t.phase_m + np.rint((sel - t.phase_m) / t.bit_length_m) * t.bit_length_m
        dev.append(sel - grid)
        dof += sel.size - 2
    return float(np.sqrt(np.sum(np.concatenate(dev) ** 2) / dof))


@pytest.fixture(scope="module", params=["out-of-plane", "in-plane"])
def long_bits(request):
    im = track_image(orientation=request.param, bit_m=80e-9, jitter_m=3e-9, seed=21)
    return im, analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)


def test_long_bits(long_bits):
    im, r = long_bits
    assert r.has_tracks and r.orientation.orientation == im.truth["orientation"]
    assert r.bit_length_m == pytest.approx(80e-9, rel=0.02)
    assert abs(r.bit_length_m - 80e-9) < 4 * r.bit_length_std_m + 0.2e-9  # the uncertainty is honest
    assert r.track_pitch_m == pytest.approx(500e-9, rel=0.03)
    assert r.track_width_m == pytest.approx(380e-9, rel=0.05)
    # long bits: the jitter of this image (true positions about the fitted grids; with 40-50 transitions it
    # scatters about the written 3 nm by ~0.4 nm) within 15 %, far better than a factor 2
    assert r.transition_jitter_m == pytest.approx(_sample_jitter(r, im), rel=0.15)
    assert r.transition_jitter_m == pytest.approx(3e-9, rel=0.5)
    errs = _matched_errors(r, im)
    assert np.sqrt(np.mean(errs**2)) < 1e-9  # every transition placed to a fraction of a nanometre
    assert r.erase_band_m is None and any("erase band" in s.lower() for s in r.sentences)


def test_json_keys(long_bits):
    _, r = long_bits
    d = r.to_dict()
    for key in ("orientation", "orientation_confidence", "bit_length_nm", "bit_length_std_nm", "track_pitch_nm",
                "track_width_nm", "transition_jitter_nm", "transition_width_nm", "tracks", "transitions"):
        assert key in d
    assert len(d["tracks"]) == len(r.tracks) and len(d["transitions"]) == sum(t.positions_m.size for t in r.tracks)
    assert {"track", "position_nm", "deviation_nm", "off_grid", "in_jitter"} <= set(d["transitions"][0])


@pytest.mark.parametrize("orientation", ["out-of-plane", "in-plane"])
def test_bits_near_the_resolution_limit(orientation):
    im = track_image(orientation=orientation, bit_m=24e-9, pixel_m=5e-9, lift_m=25e-9, rows=192, cols=320,
                     jitter_m=3e-9, seed=22)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.bit_length_m == pytest.approx(24e-9, rel=0.02)
    assert 1.5e-9 < r.transition_jitter_m < 6e-9  # within a factor 2
    # closely spaced transitions pull each other in the image; the joint fit undoes it
    assert r.interaction_shift_m > 0.3e-9
    assert np.sqrt(np.mean(_matched_errors(r, im) ** 2)) < 0.5 * r.interaction_shift_m + 0.3e-9


def test_tracks_along_columns_and_skewed():
    im = track_image(orientation="in-plane", rows=256, cols=192, seed=23)
    r = analyse_tracks(im.phase_deg.T, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.to_dict()["track_direction"] == "columns"
    assert r.bit_length_m == pytest.approx(80e-9, rel=0.02)
    # a skew of 1 px over the image height, put in by shifting rows (band-limited)
    img = im.phase_deg
    f = np.fft.rfftfreq(img.shape[1])
    shifts = np.linspace(-0.5, 0.5, img.shape[0]) * 3.0
    skewed = np.fft.irfft(np.fft.rfft(img, axis=1) * np.exp(-2j * np.pi * np.outer(shifts, f)), n=img.shape[1],
                          axis=1)
    rs = analyse_tracks(skewed, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert rs.skew_px_per_row == pytest.approx(3.0 / img.shape[0], rel=0.3)
    assert rs.transition_jitter_m < 6e-9


def test_skewed_tracks_report_positions_where_the_image_has_them():
    # rows moved by 8 px over the image height: the fit straightens the tracks about the middle row, and the
    # positions used to stay in that frame, off by skew (track row - middle row) pixels: +26.5, +8.5, -7.2 and
    # -27.7 nm for these four tracks
    im = track_image(orientation="out-of-plane", rows=256, cols=256, seed=23, noise_deg=0.01)
    rows = im.phase_deg.shape[0]
    shifts = np.linspace(-0.5, 0.5, rows) * 8.0
    f = np.fft.rfftfreq(im.phase_deg.shape[1])
    skewed = np.fft.irfft(np.fft.rfft(im.phase_deg, axis=1) * np.exp(-2j * np.pi * np.outer(shifts, f)),
                          n=im.phase_deg.shape[1], axis=1)
    r = analyse_tracks(skewed, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.skew_px_per_row == pytest.approx(8.0 / (rows - 1), rel=0.05)
    for t in r.tracks:
        row = t.core_m[0] / im.pixel_m - 0.5  # the rows averaged into the profile are centred here
        truth = im.transitions[int(np.argmin(np.abs(im.track_centres_m - t.centre_m)))]
        truth = truth + np.interp(row, np.arange(rows), shifts) * im.pixel_m
        err = np.array([x - truth[np.argmin(np.abs(truth - x))] for x in t.positions_m])
        assert np.median(np.abs(err)) < 1e-9, err  # the last few pixels hold the shift's mirrored edge
        # the grid in the same frame: each deviation is the position's distance from phase + n bit
        off = (t.positions_m - t.phase_m + 0.5 * t.bit_length_m) % t.bit_length_m - 0.5 * t.bit_length_m
        ok = np.isfinite(t.deviations_m)
        np.testing.assert_allclose(off[ok], t.deviations_m[ok], atol=1e-12)


def test_skewed_scan_straightened_about_each_track():
    # a wider scan whose rows move by 8 px over the image height, cropped, so every pixel holds written data: the
    # image was straightened about its middle row, which moved a track's rows far from it by up to 4 px and brought
    # the shift's mirror image in at the row's ends; the first and last transitions of the bottom track were
    # placed 43 nm and 21 nm off (seed 25). Each track is now straightened about its own core's centre row
    rows, cols, margin = 256, 256, 32
    im = track_image(orientation="out-of-plane", rows=rows, cols=cols + 2 * margin, seed=25)
    shifts = np.linspace(-0.5, 0.5, rows) * 8.0
    f = np.fft.rfftfreq(cols + 2 * margin)
    wide = np.fft.irfft(np.fft.rfft(im.phase_deg, axis=1) * np.exp(-2j * np.pi * np.outer(shifts, f)),
                        n=cols + 2 * margin, axis=1)
    r = analyse_tracks(wide[:, margin:margin + cols], pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.skew_px_per_row * (rows - 1) == pytest.approx(8.0, rel=0.1)
    for t in r.tracks:
        row = t.core_m[0] / im.pixel_m - 0.5
        truth = im.transitions[int(np.argmin(np.abs(im.track_centres_m - t.centre_m)))]
        truth = truth + (np.interp(row, np.arange(rows), shifts) - margin) * im.pixel_m
        err = np.array([x - truth[np.argmin(np.abs(truth - x))] for x in t.positions_m])
        assert np.max(np.abs(err)) < 3e-9, err


def test_erase_bands_beside_old_data():
    im = track_image(orientation="in-plane", erase_m=30e-9, old_data_bit_m=100e-9, seed=24)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.bit_length_m == pytest.approx(80e-9, rel=0.02)
    # the field's spread with height blurs a 30 nm band: measured 16-26 nm over 120 such images (documented), and
    # the result says that it reads low
    assert 12e-9 < r.erase_band_m < 45e-9
    assert any(s.startswith("Erase band") and "reads low" in s for s in r.sentences)


@pytest.mark.parametrize("orientation", ["in-plane", "out-of-plane"])
def test_a_track_that_does_not_stand_out_leaves_the_pitch_and_erase_band_right(orientation):
    # in this image one of the four tracks has too few transitions to stand out from the old data beside it and
    # is not found: its gap counted as one pitch read 750 nm (written 500 nm), and in-plane the gap from a track
    # to the old data beyond the missed one read as a 272 nm erase band
    im = track_image(orientation=orientation, erase_m=30e-9, old_data_bit_m=100e-9, seed=31)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.track_pitch_m == pytest.approx(500e-9, rel=0.01)
    assert any("did not stand out" in s for s in r.sentences)
    assert r.erase_band_m is None or 12e-9 < r.erase_band_m < 45e-9


@pytest.mark.parametrize("orientation, seed", [("out-of-plane", 4), ("in-plane", 8)])
def test_pitch_from_the_activity_period_when_tracks_are_missed(orientation, seed):
    # 300 nm pitch with old data between the tracks: in these images some tracks do not stand out. Out-of-plane
    # seed 4 left two complete tracks three pitches apart (the pitch read 901 nm); in-plane seed 8 a gap of two
    # pitches and a track whose centre the old data moved (317 nm)
    im = track_image(orientation=orientation, seed=seed, pitch_m=300e-9, width_m=220e-9, erase_m=20e-9,
                     old_data_bit_m=100e-9)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.track_pitch_m == pytest.approx(300e-9, rel=0.01)
    assert any("did not stand out" in s for s in r.sentences)


def test_activity_period_of_tracks_of_unequal_strength():
    from assistant.analysis.media.track_metrics import activity_period

    # bands 30 px wide every 41.5 px, each with its own level, plus noise: the period, not a multiple of it
    rng = np.random.default_rng(3)
    y = np.arange(300)
    profile = np.zeros(y.size)
    for c in np.arange(10.0, 300.0, 41.5):
        profile += rng.uniform(0.5, 1.5) / (1 + np.exp(-(y - c + 15) / 2)) / (1 + np.exp((y - c - 15) / 2))
    profile += 0.05 * rng.standard_normal(y.size)
    assert activity_period(profile) == pytest.approx(41.5, abs=1.0)
    assert activity_period(np.ones(100)) is None


@pytest.mark.parametrize("orientation, seed, kw", [("in-plane", 8, {"jitter_m": 8e-9}),
                                                    ("out-of-plane", 21, {"jitter_m": 8e-9}),
                                                    ("out-of-plane", 24, {"jitter_m": 8e-9}),
                                                    ("out-of-plane", 4, {"noise_deg": 0.1})])
def test_the_clock_is_the_cell_the_tracks_share(orientation, seed, kw):
    # in these images one track's own grid took a wrong cell (45, 150, 255 and 207 nm for 80), and the clock used
    # to be taken from the track whose profile fitted best, whatever its grid; 7 of 60 images with 8 nm jitter
    # and 3 of 60 with 0.1 deg noise read a wrong bit length that way
    im = track_image(orientation=orientation, seed=seed, **kw)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.bit_length_m == pytest.approx(80e-9, rel=0.02)


@pytest.mark.parametrize("orientation, seed, kw", [("in-plane", 219, {}), ("out-of-plane", 202, {"thickness_m": 15e-9}),
                                                    ("out-of-plane", 225, {"thickness_m": 15e-9})])
def test_a_chance_short_cell_does_not_refuse_a_well_sampled_image(orientation, seed, kw):
    # 80 nm bits on 8 nm pixels, seven or eight transitions a track: a 20-25 nm cell held nearly all of them by
    # chance and won the clock, and the image was refused ("bits of about 22 nm are only 2.8 pixels long"; 4 of
    # 180 images of this kind, none now)
    im = track_image(orientation=orientation, seed=seed, rows=160, cols=200, old_data_bit_m=100e-9, erase_m=30e-9)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m, **kw)
    assert r.bit_length_m == pytest.approx(80e-9, rel=0.02)


def test_pairs_the_fit_made_up_within_a_pixel_are_taken_out():
    # out-of-plane old data beside the tracks leave a field the track model lacks: the fit split transitions into
    # three within a pixel and put pairs on top of each other (10 and 24 spurious ones on two tracks of 13 and 8
    # written), the tracks' grids took 48 and 51 nm cells and the bit length read 50.0 nm for 80 (0.02 deg noise)
    im = track_image(orientation="out-of-plane", seed=233, rows=160, cols=200, old_data_bit_m=100e-9, erase_m=30e-9)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.bit_length_m == pytest.approx(80e-9, rel=0.02)
    assert np.max(np.abs(_matched_errors(r, im))) < 5e-9


def test_few_transitions_keep_the_cell_they_share():
    # four transitions 3, 5 and 3 cells of 80 nm apart (a track of the image above with seed 316, in-plane): the
    # coherence is broad with so few, and 215 nm held them at 93 % of the peak at 80 nm; the grid moved there
    # since the search for the fundamental looked 2 / span either side of a third of the peak's frequency. A
    # cell d times longer holds the transitions only if their cells lie d apart (now required)
    from assistant.analysis.media.bit_grid import fit_bit_grid

    g = fit_bit_grid(np.array([466.0, 707.5, 1105.7, 1343.8]) / 8.0, min_bit=2.0)
    assert g.bit_length * 8.0 == pytest.approx(80.0, rel=0.02)
    np.testing.assert_array_equal(np.diff(g.cells), [3, 5, 3])


def test_the_clock_is_not_a_half_cell():
    # one track on an exact 10 px grid, another with three transitions placed mid-cell: the half cell holds every
    # transition of both and won the clock (5.0 px); the clock is the longest whole multiple of the winner that
    # keeps 80 % of its support
    from assistant.analysis.media.bit_grid import fit_bit_grid
    from assistant.analysis.media.track_metrics import _clock

    rng = np.random.default_rng(0)
    a = np.array([0, 1, 3, 4, 6, 9, 10, 12, 13, 15]) * 10.0 + 20 + rng.normal(0, 0.3, 10)
    b = np.array([0, 2, 3, 5, 7, 8, 11, 12, 14]) * 10.0 + 23 + rng.normal(0, 0.3, 9)
    b = np.sort(np.r_[b, 23.0 + np.array([45.0, 95.0, 135.0])])
    found = [fit_bit_grid(x, min_bit=2.0) for x in (a, b)]
    assert sorted(round(g.bit_length) for g in found) == [5, 10]
    assert _clock([a, b], found, 4.0)[0] == pytest.approx(10.0, rel=0.01)


@pytest.mark.slow
def test_bit_length_over_many_images_with_old_data():
    # 80 nm bits, old data of 100 nm bits past 30 nm erase bands, 0.02 deg noise, seeds 245-319, both
    # orientations: 7 of 150 images read a wrong bit length (40-360 nm) before the made-up pairs were taken out,
    # the clock kept the longest cell and a longer grid cell needed its transitions' cells to lie apart; 1 now
    wrong = []
    for orientation in ("out-of-plane", "in-plane"):
        for seed in range(245, 320):
            im = track_image(orientation=orientation, seed=seed, rows=160, cols=200, old_data_bit_m=100e-9,
                             erase_m=30e-9)
            try:
                r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
                ok = r.bit_length_m is not None and abs(r.bit_length_m / 80e-9 - 1) <= 0.02
            except TooFewPixelsPerBitError:
                ok = False
            if not ok:
                wrong.append((orientation, seed))
    assert len(wrong) <= 2, wrong


def test_transitions_placed_where_there_are_none_are_not_jitter():
    # at five times the default noise two transitions near the ends of two tracks were placed 20-48 nm from any
    # written one, within 30 % of a cell of the grid: the jitter read 7.75 nm for a written 3 nm. Beyond four robust
    # standard deviations of all the deviations they were left out (5.86 nm, the sentence saying so). Since pairs
    # the fit makes up within a pixel are taken out, none is placed (4 beyond 10 nm before, up to 48 nm; now the
    # largest error is 2.6 nm) and the jitter reads 3.73 nm, so the sentence is no longer there to check
    im = track_image(orientation="out-of-plane", seed=0, noise_deg=0.1)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert r.transition_jitter_m < 4.5e-9
    assert np.max(np.abs(_matched_errors(r, im))) < 5e-9


def test_transition_width_with_the_tip_transfer_function():
    # with the tip's transfer function (here the point probe the images were made with) and the film thickness,
    # the arctan parameter comes out; without it the tip's offset stays in (an upper bound)
    im = track_image(orientation="out-of-plane", transition_a_m=10e-9, seed=25, rows=160)
    bare = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert bare.transition_width_includes_tip and bare.transition_width_m > 25e-9
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m, thickness_m=15e-9,
                       tip_transfer=point_probe_transfer(offset_m=30e-9))
    assert not r.transition_width_includes_tip
    assert r.transition_width_m == pytest.approx(10e-9, abs=2e-9)


@pytest.mark.parametrize("maker", [lambda: domain_image(seed=26).phase_deg,
                                   lambda: np.tile(np.sin(np.arange(192) / 3.0), (128, 1)),
                                   lambda: np.random.default_rng(27).normal(size=(96, 96))])
def test_images_without_tracks_give_null_metrics(maker):
    r = analyse_tracks(maker(), pixel_m=10e-9)
    d = r.to_dict()
    assert not r.has_tracks and d["tracks"] is None and d["transitions"] is None
    assert d["bit_length_nm"] is None and d["track_pitch_nm"] is None and "No recorded tracks" in d["summary"]


def test_too_few_pixels_per_bit_names_the_pixel_size():
    im = track_image(bit_m=80e-9, pixel_m=24e-9, rows=128, cols=128, seed=28)
    with pytest.raises(TooFewPixelsPerBitError, match="pixels of at most") as info:
        analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    assert 10e-9 < info.value.needed_pixel_m < 24e-9


@pytest.mark.slow
@pytest.mark.parametrize("orientation", ["out-of-plane", "in-plane"])
def test_jitter_statistics(orientation):
    # 12 images per case: the jitter estimate's scatter and bias against the written 2 and 4 nm, long bits and
    # bits near the resolution limit (measured spread documented in DEVELOPERS.md)
    for bit, px, jit, tol in ((80e-9, 8e-9, 4e-9, 0.25), (24e-9, 5e-9, 2e-9, 1.0)):
        est = []
        for seed in range(12):
            im = track_image(orientation=orientation, bit_m=bit, pixel_m=px, jitter_m=jit, lift_m=25e-9,
                             rows=192, cols=320, seed=100 + seed)
            r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
            assert r.bit_length_m == pytest.approx(bit, rel=0.02)
            est.append(r.transition_jitter_m)
        est = np.array(est)
        assert abs(np.median(est) / jit - 1) < tol, est


@pytest.mark.parametrize("kw", [
    {},
    {"orientation": "in-plane", "seed": 8, "pitch_m": 300e-9, "width_m": 220e-9, "erase_m": 20e-9,
     "old_data_bit_m": 100e-9},
    {"pitch_m": 600e-9, "width_m": 440e-9, "bit_m": 100e-9, "erase_m": 40e-9, "old_data_bit_m": 160e-9},
])
def test_written_width_within_its_uncertainty(kw):
    # the edges are where each row's activity crosses half the plateau: smoothing the power across rows first
    # left a sharp edge at half the plateau's power, whose root is 0.71, and moved both edges out (385, 241 and
    # 450 nm for these 380, 220 and 440 nm tracks, each quoted to +-0.1-1.7 nm from the scatter between tracks)
    im = track_image(**kw)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m)
    # measured 380.1, 222.9 and 443.2 nm (+-3.3-3.5): where old data lie close, their field lifts the edges
    assert abs(r.track_width_m - im.truth["written_width_m"]) < 2 * r.track_width_std_m


def test_taking_out_the_position_noise_never_raises_the_jitter():
    # large deviations on precisely placed transitions and small ones on poorly placed ones: the weighted
    # moment equation alone gave 3.64 for a raw rms of 3.13
    from assistant.analysis.media.track_metrics import jitter_without_position_noise

    rng = np.random.default_rng(1)
    dev = np.r_[rng.normal(0, 5, 50), rng.normal(0, 0.5, 50)]
    sd = np.r_[np.full(50, 0.3), np.full(50, 4.0)]
    assert jitter_without_position_noise(dev, sd) <= np.sqrt(np.mean(dev**2))
    # where the noise explains part of the scatter, it still comes out
    same = rng.normal(0, np.hypot(3.0, 1.0), 400)
    assert jitter_without_position_noise(same, np.full(400, 1.0)) == pytest.approx(3.0, rel=0.15)


def test_no_erase_band_names_the_row_spacing(long_bits):
    _, r = long_bits
    assert any("no side band of old data was resolved (row spacing 8 nm)" in s for s in r.sentences)


@pytest.mark.parametrize("image, kw, needle", [(np.zeros((32, 32)), {"thickness_m": 0.0}, "thickness_m must be > 0"),
                                               (np.full((32, 32), np.inf), {}, "not finite (100% infinite)")])
def test_bad_input_is_one_line(image, kw, needle):
    from assistant.analysis.media import MediaInputError

    with pytest.raises(MediaInputError) as info:
        analyse_tracks(image, pixel_m=10e-9, **kw)
    assert needle in str(info.value) and "\n" not in str(info.value)


@pytest.mark.parametrize("orientation", ["in-plane", "out-of-plane"])
def test_transition_width_with_the_oscillation_amplitude(orientation):
    # images made with the published model times the oscillation's weight 2 I1(kA) e^(-kA) / (kA) (Giessibl 1997,
    # Phys. Rev. B 56, 16010; scipy's i1e in synthetic_media.py), A = 20 nm, written a = 15 nm: without the
    # amplitude the width read 32.2 (in-plane) and 31.4 nm (out-of-plane); with it 15.8 +- 0.4 and 15.1 +- 0.6 nm
    im = track_image(orientation=orientation, transition_a_m=15e-9, seed=25, rows=160, amplitude_m=20e-9)
    kw = {"pixel_m": im.pixel_m, "lift_m": im.lift_m, "thickness_m": 15e-9,
          "tip_transfer": point_probe_transfer(offset_m=30e-9)}
    bare = analyse_tracks(im.phase_deg, **kw)
    assert bare.transition_width_m > 25e-9 and bare.to_dict()["transition_width_includes_oscillation"]
    assert any("includes the averaging over the cantilever's oscillation" in s for s in bare.sentences)
    r = analyse_tracks(im.phase_deg, amplitude_m=20e-9, **kw)
    assert not r.to_dict()["transition_width_includes_oscillation"]
    # the fit's standard error, widened by the model's own residual bias at A = 0 (15.5 +- 0.4 nm for 15)
    assert abs(r.transition_width_m - 15e-9) < 3 * r.transition_width_std_m + 0.5e-9


def test_the_neighbours_pull_is_measured_on_seeds_detected_at_the_fitted_width():
    # Seed 3 at 512 x 512 (the benchmark image): one track is fitted again from seeds detected at 1.5 times the
    # width; those seeds sit 3.4 px rms from the fitted positions, an offset of the trial width, not a pull of the
    # neighbours, and counted in they made the shift read 9.2 nm. The fitted positions lie within 3 nm of the
    # generator's transitions (the published superposition of arctan transitions), so what is left is the
    # detector's own pull on the other tracks: well under a pixel (7.8 nm).
    im = track_image(rows=512, cols=512, seed=3, orientation="out-of-plane", bit_m=80e-9)
    r = analyse_tracks(im.phase_deg, pixel_m=im.pixel_m, lift_m=im.lift_m).to_dict()
    for k, truth in enumerate(im.transitions):
        placed = np.array([t["position_nm"] for t in r["transitions"] if t["track"] == k]) * 1e-9
        assert np.abs(placed[:, None] - truth[None, :]).min(axis=1).max() < 3e-9
    assert r["interaction_shift_nm"] < 1.0
