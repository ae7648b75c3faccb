"""Images: colour science of the phase map, the shared zero-centred scale, and what the PNGs show."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from matplotlib.image import AxesImage

import assistant
from assistant.report import colours, images

# ---- independent forward conversion sRGB -> CIELAB for the checks (IEC 61966-2-1:1999; CIE 15:2004) -----
_SRGB_TO_XYZ = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
_WHITE = np.array([0.95047, 1.0, 1.08883])


def _srgb_to_lab(rgb: np.ndarray) -> np.ndarray:
    rgb = np.asarray(rgb, dtype=float)
    linear = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    t = (linear @ _SRGB_TO_XYZ.T) / _WHITE
    d = 6 / 29
    f = np.where(t > d**3, np.cbrt(t), t / (3 * d**2) + 4 / 29)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]), 200 * (f[..., 1] - f[..., 2])], -1)


def test_lab_to_srgb_reference_colours():
    # sRGB red (1, 0, 0) is CIELAB (53.2408, 80.0925, 67.2032) under D65 (value from memory, as tabulated from
    # the IEC 61966-2-1 primaries); white and black are exact.
    np.testing.assert_allclose(colours.lab_to_srgb([53.2408, 80.0925, 67.2032]), [1, 0, 0], atol=2e-3)
    np.testing.assert_allclose(colours.lab_to_srgb([100, 0, 0]), [1, 1, 1], atol=2e-4)
    np.testing.assert_allclose(colours.lab_to_srgb([0, 0, 0]), [0, 0, 0], atol=1e-12)
    # grey 0.5: Y from the sRGB transfer function, L* = 116 Y^(1/3) - 16 (CIE 15:2004)
    y = ((0.5 + 0.055) / 1.055) ** 2.4
    np.testing.assert_allclose(colours.lab_to_srgb([116 * np.cbrt(y) - 16, 0, 0]), [0.5] * 3, atol=2e-4)
    # round trip through the independent forward conversion
    rng = np.random.default_rng(3)
    rgb = rng.uniform(0.05, 0.95, (50, 3))
    np.testing.assert_allclose(colours.lab_to_srgb(_srgb_to_lab(rgb)), rgb, atol=2e-3)


def test_phase_map_dark_negative_neutral_zero_and_uniform_steps():
    raw = colours.lab_to_srgb(colours.phase_lab(257))
    assert raw.min() >= 0.0 and raw.max() <= 1.0  # no clipping anywhere: the map is what was designed
    rgb = images.phase_colormap(257)(np.linspace(0, 1, 257))[:, :3]
    lab = _srgb_to_lab(rgb)
    assert np.all(np.diff(lab[:, 0]) > 0)  # lightness rises from negative to positive: dark = attractive
    assert lab[0, 0] < 25 and lab[-1, 0] > 85
    np.testing.assert_allclose(lab[128, 1:], 0.0, atol=0.3)  # zero is neutral grey
    assert rgb[0, 2] > rgb[0, 0] and rgb[-1, 0] > rgb[-1, 2]  # blue below zero, yellowish above
    step = np.linalg.norm(np.diff(lab, axis=0), axis=1)  # CIE76 colour difference per step
    for side in (step[:128], step[128:]):
        assert side.std() / side.mean() < 0.05
    assert abs(step[:128].mean() / step[128:].mean() - 1) < 0.05  # both signs equally strong
    assert np.isnan(images.phase_colormap()(np.nan)).sum() == 0 and images.phase_colormap()(np.nan)[3] == 0.0


def _stack():
    x = np.linspace(-1, 1, 40)
    base = np.where(x < 0, -1.0, 1.0)[None, :].repeat(30, axis=0)  # left half negative, right half positive
    return np.array([3 * base, 1.5 * base, 0.5 * base]), [10e-9, 25e-9, 60e-9]


def test_phase_panels_share_one_scale_centred_on_zero():
    stack, heights = _stack()
    fig = images.phase_figure(stack, heights_m=heights, scan_size_m=5e-6, repeat_phase_deg=stack[0], lines=40)
    ims = [a for ax in fig.axes for a in ax.get_children() if isinstance(a, AxesImage)]
    assert len(ims) == 4
    clims = {im.get_clim() for im in ims}
    assert clims == {(-3.0, 3.0)}
    titles = [ax.get_title() for ax in fig.axes if ax.get_title()]
    assert titles == ["lift 10 nm", "lift 25 nm", "lift 60 nm", "lift 10 nm, repeat"]
    assert "phase (deg)" in fig.axes[-1].get_ylabel()  # the colour bar, with units
    assert ims[0].get_array().shape == (40, 40) and np.ma.getmaskarray(ims[0].get_array())[30:].all()
    assert ims[0].get_extent() == [0.0, 5.0, 0.0, 5.0]  # micrometres
    with pytest.raises(ValueError, match="heights"):
        images.phase_figure(stack, heights_m=heights[:2], scan_size_m=5e-6)


def test_rendered_phase_is_dark_where_negative_and_fades_with_height():
    stack, heights = _stack()
    fig = images.phase_figure(stack, heights_m=heights, scan_size_m=4e-6)
    fig.canvas.draw()
    pixels = np.asarray(fig.canvas.buffer_rgba())[..., :3] / 255.0
    height_px = pixels.shape[0]

    def lightness_at(ax, x_um: float, y_um: float) -> float:
        col, row = ax.transData.transform((x_um, y_um))
        return float(_srgb_to_lab(pixels[int(height_px - row), int(col)])[0])

    image_axes = [ax for ax in fig.axes if ax.get_images()]
    left = [lightness_at(ax, 1.0, 2.0) for ax in image_axes]
    right = [lightness_at(ax, 3.0, 2.0) for ax in image_axes]
    assert all(lo < 50 < hi for lo, hi in zip(left, right))  # negative (attractive) dark, positive light
    assert left[0] < left[1] < left[2] and right[0] > right[1] > right[2]  # contrast fades with lift height
    assert left[0] == pytest.approx(20.5, abs=2.5)  # the -3 deg end of the map, L* 20


def test_topography_in_nm_plane_removed_axes_in_um(tmp_path):
    rows, cols = np.indices((20, 30))
    tilt = 2e-9 + 1e-10 * rows - 3e-11 * cols
    np.testing.assert_allclose(images.remove_plane(tilt), 0.0, atol=1e-20)
    bump = np.where((rows - 10) ** 2 + (cols - 15) ** 2 < 16, 4e-9, 0.0)
    fig = images.topography_figure(tilt + bump, scan_size_m=2e-6, lines=25)
    ax = fig.axes[0]
    assert ax.get_xlim() == (0.0, 2.0) and ax.get_xlabel() == "x (µm)"
    assert "height (nm)" in fig.axes[1].get_ylabel()
    lo, hi = ax.get_images()[0].get_clim()
    assert 3.0 < hi - lo < 4.5  # the 4 nm bump, in nm, once the tilt is gone
    path = images.save_png(fig, tmp_path / "t.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_no_pyplot_and_storage_does_not_load_matplotlib():
    repo = str(Path(assistant.__file__).resolve().parents[1])
    code = ("import sys, numpy as np\n"
            "import assistant.storage\n"
            "assert 'matplotlib' not in sys.modules, 'storage imported matplotlib'\n"
            "import assistant.report\n"
            "assert 'matplotlib' not in sys.modules, 'the report package imported matplotlib eagerly'\n"
            "from assistant.report import images\n"
            "images.phase_figure(np.zeros((1, 4, 4)), heights_m=[1e-8], scan_size_m=1e-6)\n"
            "assert 'matplotlib.pyplot' not in sys.modules\n")
    done = subprocess.run([sys.executable, "-c", code], cwd=repo, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr


def test_phase_figures_over_biases_match_a_fresh_figure_per_bias(tmp_path):
    """The bias grid's phase maps are drawn on one figure given each bias's images, scale and title in turn (to
    save building the axes again); every file must be pixel for pixel the figure drawn afresh for that bias."""
    from PIL import Image

    rng = np.random.default_rng(2)
    # (heights, biases, lines, pixels), each bias at its own scale and a partly scanned frame (NaN rows)
    phase = rng.normal(size=(3, 3, 20, 24)) * np.array([1.0, 4.0, 0.3])[None, :, None, None]
    heights = np.array([20e-9, 40e-9, 80e-9])
    titles = [f"s: phase at tip bias {b:+.3g} V" for b in (-1.0, 0.0, 1.0)]
    reused = images.phase_figures_over_biases(phase, [tmp_path / f"r{j}.png" for j in range(3)], heights_m=heights,
                                              scan_size_m=2e-6, titles=titles, lines=24)
    assert [p.name for p in reused] == ["r0.png", "r1.png", "r2.png"]
    for j in range(3):
        fresh = images.save_png(images.phase_figure(phase[:, j], heights_m=heights, scan_size_m=2e-6, lines=24,
                                                    title=titles[j]), tmp_path / f"f{j}.png")
        a, b = (np.asarray(Image.open(p)) for p in (reused[j], fresh))
        assert a.shape == b.shape and np.array_equal(a, b), f"bias {j}: {np.count_nonzero(a != b)} values differ"
