"""One and two lift heights without the decomposition: V_cpd from the bias parabola of the image mean, the noise,
the repeat check, and a result that holds only what was measured.

The stacks are built in tests/analysis/lift_series/synthetic_series.py from the published physics, independently of the
analysis: the electrostatic gradient 1/2 C''(z) (V - V_cpd)^2 with the exact sphere-plane capacitance series
(Smythe 1968, Static and Dynamic Electricity) plus the cone term of Hudlet, Saint Jean, Guthmann & Berger 1998
(Eur. Phys. J. B 2, 5), the magnetic contrast by Fourier continuation of a film's stray field, the Hamaker
sphere-plane attraction, phase = -arctan(Q F'/k).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from assistant.analysis.imaging import DECOMPOSITION_MIN_HEIGHTS, analyse_imaging, fit_bias_parabola
from assistant.analysis.lift_series import gradient_from_phase_deg
from tests.analysis.lift_series import synthetic_series as synthetic

BIASES = np.array([-1.0, -0.5, 0.0, 0.5, 1.0])


@pytest.fixture(scope="module")
def clean_single():
    """One lift height (30 nm), five biases, no noise: the truth the noisy repeats are drawn around."""
    return synthetic.build_series(rows=48, cols=48, pixel_m=20e-9, heights_m=(30e-9,), bias_v=BIASES, cpd_v=0.35,
                                  noise_deg=0.0, margin_px=12, seed=4)


def noisy(clean: np.ndarray, rng, *, pixel_deg: float, line_deg: float) -> np.ndarray:
    """White pixel noise plus an offset per scan line of every pass (a wandering phase reference)."""
    lines = rng.normal(scale=line_deg, size=clean.shape[:-1])[..., None]
    return clean + rng.normal(scale=pixel_deg, size=clean.shape) + lines


def test_cpd_of_one_height_within_its_standard_error_of_the_published_model(clean_single):
    s = clean_single
    rng = np.random.default_rng(11)
    a = analyse_imaging(noisy(s.phase_deg, rng, pixel_deg=0.03, line_deg=0.01), heights_m=s.heights_m,
                        bias_v=BIASES, **{k: s.analysis_kwargs[k] for k in ("spring_constant_n_per_m",
                                                                             "quality_factor")})
    assert a.cpd_v is not None and a.cpd_std_v > 0
    # the vertex of 1/2 C'' (V - V_cpd)^2 is V_cpd (Hudlet et al. 1998): within three standard errors
    assert abs(a.cpd_v - s.cpd_v) < 3 * a.cpd_std_v
    assert a.cpd_std_v < 0.01
    d = a.to_dict()
    json.dumps(d)
    assert d["kind"] == "imaging" and d["cpd_v"] == a.cpd_v
    for key in ("recommended_lift_nm", "magnetic_rms_deg", "electrostatic_mean_deg", "short_range_mean_deg"):
        assert key not in d  # never claims what one height cannot give
    assert str(DECOMPOSITION_MIN_HEIGHTS) in d["decomposition"] and "has 1" in d["decomposition"]


def test_cpd_standard_error_matches_its_scatter(clean_single):
    # 60 repeats of one pattern with fresh noise: the estimates scatter by about the reported standard error
    # (the standard deviation of a 60-sample standard deviation is about 9 %, so 0.75-1.3 is about 3 of those)
    s = clean_single
    rng = np.random.default_rng(2026)
    k = {key: s.analysis_kwargs[key] for key in ("spring_constant_n_per_m", "quality_factor")}
    cpd, err = [], []
    for _ in range(60):
        p = noisy(s.phase_deg, rng, pixel_deg=0.03, line_deg=0.01)
        g = gradient_from_phase_deg(p, **k)
        fit = fit_bias_parabola(g, bias_v=BIASES)
        cpd.append(fit.cpd_v)
        err.append(fit.cpd_std_v)
    ratio = np.std(cpd, ddof=1) / np.mean(err)
    assert 0.75 < ratio < 1.3, ratio
    assert abs(np.mean(cpd) - s.cpd_v) < 4 * np.std(cpd, ddof=1) / np.sqrt(len(cpd))


def test_two_heights_share_one_vertex():
    s = synthetic.build_series(rows=32, cols=32, pixel_m=20e-9, heights_m=(20e-9, 40e-9), bias_v=BIASES,
                               cpd_v=-0.2, noise_deg=0.02, margin_px=8, seed=9)
    a = analyse_imaging(s.phase_deg, heights_m=s.heights_m, bias_v=BIASES,
                        spring_constant_n_per_m=2.8, quality_factor=200.0)
    assert abs(a.cpd_v + 0.2) < 3 * a.cpd_std_v
    assert a.image_mean_deg.shape == (2, 5) and a.parabola_deg.shape[0] == 2
    # the electrostatic attraction weakens with height: the curvature (in force gradient) falls
    assert a.parabola.curvature[0] > a.parabola.curvature[1] > 0


def test_no_bias_dependence_gives_no_cpd(clean_single):
    # the same magnetic images at every bias, noise only: no parabola, no V_cpd
    rng = np.random.default_rng(3)
    flat = np.repeat(clean_single.magnetic_phase_deg[:, None], BIASES.size, axis=1)
    a = analyse_imaging(noisy(flat, rng, pixel_deg=0.03, line_deg=0.0), heights_m=clean_single.heights_m,
                        bias_v=BIASES)
    assert a.cpd_v is None and "not determined" in a.parabola.sentence
    assert a.to_dict()["cpd_v"] is None and "not determined" in a.to_dict()["cpd_sentence"]


def test_noise_from_the_repeat_and_the_thermal_verdict():
    s = synthetic.build_series(rows=48, cols=48, pixel_m=20e-9, heights_m=(30e-9,), noise_deg=0.05, repeat=True,
                               margin_px=12, seed=5)
    kw = s.analysis_kwargs
    a = analyse_imaging(s.phase_deg, heights_m=s.heights_m, repeat_phase_deg=s.repeat_phase_deg,
                        spring_constant_n_per_m=kw["spring_constant_n_per_m"], quality_factor=kw["quality_factor"],
                        resonance_hz=kw["resonance_hz"], amplitude_m=10e-9, bandwidth_hz=100.0)
    assert a.noise_source.startswith("the repeat pass")
    assert a.reference_noise_deg == pytest.approx(0.05, rel=0.1)
    assert a.tip_change is not None and not a.tip_change.irreversible
    assert a.noise.thermal_phase_noise_deg is not None and a.noise.verdict != "unknown"
    assert a.bias_v is None and a.cpd_v is None and a.image_mean_deg.shape == (1,)
    # the contrast about the mean with the noise taken out: the rms of the true magnetic image
    assert a.contrast_rms_deg[0] == pytest.approx(np.std(s.magnetic_phase_deg[0]), rel=0.02)


def test_changed_sample_is_reported_on_one_height():
    s = synthetic.build_series(rows=48, cols=48, pixel_m=20e-9, heights_m=(30e-9,), noise_deg=0.02, repeat=True,
                               flip_disk=(24, 24, 8), seed=6)
    a = analyse_imaging(s.phase_deg, heights_m=s.heights_m, repeat_phase_deg=s.repeat_phase_deg)
    assert a.tip_change.irreversible and a.to_dict()["tip_changed_sample"] is True


def test_without_repeat_or_grid_the_noise_is_only_an_upper_bound():
    # coarse pixels: the magnetic contrast reaches the highest frequencies, which then are no noise estimate
    s = synthetic.build_series(rows=32, cols=32, pixel_m=60e-9, heights_m=(20e-9,), noise_deg=0.02, seed=7)
    a = analyse_imaging(s.phase_deg, heights_m=s.heights_m, spring_constant_n_per_m=2.8, quality_factor=200.0,
                        resonance_hz=75e3, amplitude_m=10e-9, bandwidth_hz=100.0)
    assert a.reference_noise_deg > 0.02
    assert a.noise.verdict == "upper_bound" and "upper bound" in a.noise.sentence
    # in degrees written as every other noise sentence writes them
    assert "° rms" in a.noise.sentence and " deg" not in a.noise.sentence
    assert "line-to-line offsets not included" in a.mean_std_source


def test_bad_input_names_the_problem():
    from assistant.analysis.imaging import ImagingInputError

    with pytest.raises(ImagingInputError, match="heights"):
        analyse_imaging(np.zeros((2, 8, 8)), heights_m=[10e-9])
    with pytest.raises(ImagingInputError, match="bias_v"):
        analyse_imaging(np.zeros((1, 3, 8, 8)), heights_m=[10e-9])
    with pytest.raises(ImagingInputError, match="3 distinct"):
        fit_bias_parabola(np.zeros((1, 3, 8, 8)), bias_v=[0.0, 0.0, 1.0])


def test_two_biases_give_images_and_say_why_there_is_no_cpd(clean_single):
    rng = np.random.default_rng(8)
    two = noisy(clean_single.phase_deg[:, [0, 4]], rng, pixel_deg=0.03, line_deg=0.0)
    a = analyse_imaging(two, heights_m=clean_single.heights_m, bias_v=BIASES[[0, 4]])
    d = a.to_dict()
    assert a.parabola is None and d["cpd_sentence"].startswith("V_cpd needs at least three")
    assert "cpd_v" not in d and np.asarray(d["image_mean_deg"]).shape == (1, 2)
    # the noise from the difference of the two bias images (same magnetic contrast): the 0.03 deg put in
    assert a.noise_source.startswith("the difference of two bias images")
    assert a.reference_noise_deg == pytest.approx(0.03, rel=0.1)
