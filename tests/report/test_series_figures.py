"""Decomposition figures: object API on the Agg canvas, labelled axes with units, phase maps on a diverging
map centred on zero with dark = negative, and the recommendation shown."""

import re

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.image import AxesImage

from assistant.analysis.lift_series.decomposition import analyse_series
from assistant.report import series_figures as sf
from assistant.report.results import parts_together_deg
from tests.analysis.lift_series.synthetic_series import build_series

HEIGHTS = np.array([10, 14, 18, 24, 30, 40]) * 1e-9
UNIT = re.compile(r"\((deg|nm|µm|m?V)\)")


@pytest.fixture(scope="module")
def with_repeat():
    s = build_series(rows=64, cols=64, heights_m=HEIGHTS, noise_deg=0.05, magnetic_scale=0.3, repeat=True,
                     flip_disk=(20, 30, 6), hamaker_j=2e-19, seed=51)
    return analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m, repeat_phase_deg=s.repeat_phase_deg,
                          **s.analysis_kwargs)


@pytest.fixture(scope="module")
def with_bias():
    s = build_series(rows=64, cols=64, heights_m=HEIGHTS, noise_deg=0.05, magnetic_scale=0.3, hamaker_j=2e-19,
                     bias_v=np.array([-1.0, 0.0, 1.0]), seed=52)
    return analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m, bias_v=s.bias_v, **s.analysis_kwargs)


def _srgb_to_lightness(rgb):
    # IEC 61966-2-1:1999 sRGB decoding and CIE 15:2004 lightness L* from the relative luminance Y
    rgb = np.asarray(rgb, float)[..., :3]
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    y = lin @ np.array([0.2126, 0.7152, 0.0722])
    f = np.where(y > (6 / 29) ** 3, np.cbrt(y), y / (3 * (6 / 29) ** 2) + 4 / 29)
    return 116 * f - 16


@pytest.mark.parametrize("which", ["with_repeat", "with_bias"])
def test_every_axis_labelled_with_units(which, request):
    a = request.getfixturevalue(which)
    figs = sf.series_figures(a)
    assert set(figs) == {"decomposition_mean", "decomposition_magnetic", "decomposition_maps"}
    for name, fig in figs.items():
        assert isinstance(fig.canvas, FigureCanvasAgg), name
        title = fig._suptitle.get_text()
        assert title.startswith("Recommended:"), title
        for ax in fig.axes:
            if not ax.axison:
                continue
            labels = [ax.get_xlabel(), ax.get_ylabel()]
            labels = [t for t in labels if t]
            assert labels, (name, ax.get_title())
            for t in labels:
                assert UNIT.search(t), (name, t)


def test_recommendation_shown(with_repeat):
    a = with_repeat
    fig = sf.mean_figure(a)
    texts = " ".join(t.get_text() for ax in fig.axes for t in ax.texts)
    assert a.recommendation.sentence in texts.replace("\n", " ")
    if a.recommendation.lift_height_m is not None:
        assert f"{a.recommendation.lift_height_m * 1e9:.4g} nm" in fig._suptitle.get_text()


def test_phase_maps_centred_on_zero_dark_negative(with_repeat):
    fig = sf.maps_figure(with_repeat)
    images = [im for ax in fig.axes for im in ax.get_images() if isinstance(im, AxesImage)]
    phase_images = [im for im in images if im.cmap.N >= 64]
    assert len(phase_images) >= 5  # three magnetic maps, residual, repeat difference
    for im in phase_images:
        lo, hi = im.norm.vmin, im.norm.vmax
        assert lo == pytest.approx(-hi) and hi > 0
        colours = im.cmap(np.linspace(0, 1, 33))
        light = _srgb_to_lightness(colours)
        assert np.all(np.diff(light) > 0)  # lightness rises monotonically: the negative end is dark
        assert light[0] < 35 and light[-1] > 80
        steps = np.diff(light)
        assert steps.std() < 0.1 * steps.mean()  # perceptually even in lightness
        mid = colours[16, :3]
        assert np.ptp(mid) < 0.03  # zero is a neutral grey


def test_change_map_present_only_with_repeat(with_repeat, with_bias):
    titles = [ax.get_title() for ax in sf.maps_figure(with_repeat).axes]
    assert any("changed beyond noise" in t for t in titles)
    titles = [ax.get_title() for ax in sf.maps_figure(with_bias).axes]
    assert not any("changed" in t for t in titles)


def test_contact_potential_map_only_with_a_bias_grid(with_repeat, with_bias):
    # the map whose electrostatic contrast was taken out before the magnetic fit, in mV about V_cpd
    titles = [ax.get_title() for ax in sf.maps_figure(with_bias).axes]
    assert any(t.startswith("contact potential") and "mV per px" in t for t in titles), titles
    assert not any(t.startswith("contact potential") for t in (ax.get_title() for ax in
                                                               sf.maps_figure(with_repeat).axes))


def test_write_png_files(with_bias, tmp_path):
    paths = sf.write_series_figures(with_bias, tmp_path, dpi=40)
    assert len(paths) == 3
    for p in paths:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_module_uses_no_pyplot():
    import inspect

    src = inspect.getsource(sf)
    assert "pyplot" not in src.replace("no pyplot state", "")


def test_the_mean_figure_adds_the_parts_as_gradients(with_bias):
    # each part is the phase -arctan(Q F'/k) of its own gradient; together they give the phase of the summed
    # gradient (driven damped oscillator), not the sum of the phases: the misfit panel showed 0.05 deg at -11 deg,
    # four of its error bars, from that alone
    from assistant.analysis.lift_series.phase import SignalSpace

    space = SignalSpace(2.8, 200.0)  # build_series's lever; the identity holds for any k and Q
    es, sr = np.array([-9.6, -3.0, 0.5]), np.array([-1.5, -1.5, -0.2])
    expected = space.to_phase(space.from_phase(es) + space.from_phase(sr))
    assert np.allclose(parts_together_deg(with_bias.signal_space, es, sr), expected, rtol=0, atol=1e-12)
    assert parts_together_deg("gradient", -9.6, -1.5) == pytest.approx(-11.052, abs=1e-3)
    fig = sf.mean_figure(with_bias)
    lines = [ln for ln in fig.axes[0].get_lines() if ln.get_linestyle() == "-" and len(ln.get_ydata()) == HEIGHTS.size]
    model = parts_together_deg(with_bias.signal_space, with_bias.electrostatic_mean_deg,
                                  with_bias.short_range_mean_deg[:, None])
    assert parts_together_deg("phase", -9.6, -1.5) == pytest.approx(-11.1)
    assert any(np.allclose(ln.get_ydata(), model[:, 0]) for ln in lines)


def test_a_flagged_residual_is_drawn_against_what_noise_alone_leaves(with_repeat):
    # the residual check compares with the expected residual at noise, which at the height the fit leans on lies
    # well below the noise per pixel; the figure draws that curve, so a flagged height reads as it was judged
    ax = sf.series_figures(with_repeat)["decomposition_magnetic"].axes[0]
    lines = {line.get_label(): line for line in ax.get_lines()}
    expected = lines["residual that noise alone leaves"]
    np.testing.assert_array_equal(expected.get_ydata(), with_repeat.expected_residual_rms_deg)
    np.testing.assert_array_equal(lines["continuation residual rms"].get_ydata(), with_repeat.residual_rms_deg)
