"""A bias grid whose V_cpd lies beyond the reach of its biases (all on one side of it, far off).

The image mean per height is ``1/2 C''(z) (V - V_cpd)^2`` plus the bias-independent short-range part (Hudlet,
Saint Jean, Guthmann & Berger 1998, Eur. Phys. J. B 2, 5), C'' from the exact sphere-plane image-charge series
(Smythe 1968, Static and Dynamic Electricity), the van der Waals part from the Hamaker sphere (Hamaker 1937,
Physica 4, 1058), both averaged over the oscillation (Giessibl 2001, Appl. Phys. Lett. 78, 123): the series of
synthetic_series.py. The common-vertex fit searches one bias range either side of the biases; with V_cpd = -2 V
and biases 0, 0.5 and 1 V it stopped at -1 V and reported that as V_cpd with an error of a few mV, and the advice
set the tip bias to -1 V. The imaging family says V_cpd is not determined there (test_bias_grid.py); the series
now says the same, from the same check (image_means.vertex_beyond).
"""

import re

import numpy as np
import pytest

from assistant.analysis.lift_series import SeriesAnalysis, analyse_series, fit_mean_bias_grid
from assistant.report.results import results_block
from assistant.report.series_figures import maps_figure, mean_figure
from tests.analysis.lift_series.synthetic_series import (EPS0, build_series, giessibl_average, second_derivative,
                                                         sphere_capacitance)

BIASES = np.array([0.0, 0.5, 1.0])


@pytest.fixture(scope="module")
def beyond():
    s = build_series(rows=64, cols=64, heights_m=np.array([30, 45, 70]) * 1e-9, bias_v=BIASES, cpd_v=-2.0,
                     noise_deg=0.02, magnetic_scale=0.3, seed=21)
    a = analyse_series(s.phase_deg, heights_m=s.heights_m, pixel_m=s.pixel_m, bias_v=s.bias_v, **s.analysis_kwargs)
    return s, a


def test_a_series_does_not_report_a_vertex_beyond_its_biases(beyond):
    s, a = beyond
    assert a.cpd_v is None and a.cpd_std_v is None and a.cpd_model_std_v is None  # was -1.0000 V +- a few mV
    assert "V_cpd is not determined" in a.separability_sentence
    assert "measure at biases on both sides of it" in a.separability_sentence
    assert "below" in a.separability_sentence
    # the vertex the sentence names (the chi-square profile's minimum on its grid) is near the truth
    named = float(re.search(r"vertex at ([-+0-9.]+) V", a.separability_sentence).group(1))
    assert abs(named - s.cpd_v) < 0.1
    # no tip bias advised: the parabolas' vertex is an extrapolation
    assert a.recommendation.bias_v is None
    assert "tip bias" not in a.recommendation.sentence
    # the split rests on that extrapolation: only the sum is said to be reliable
    assert not a.separable and "only their sum" in a.separability_sentence


def test_the_outputs_say_why_there_is_no_cpd(beyond):
    _, a = beyond
    d = a.to_dict()
    assert d["cpd_v"] is None and d["recommended_bias_v"] is None
    assert "not determined" in d["cpd_sentence"]
    block = dict(results_block(d))
    assert block["Recommended tip bias"].startswith("not determined")
    assert any(n.startswith("V_cpd beyond the reach of the biases") for n in d["interaction_notes"])
    again = SeriesAnalysis.from_record(*a.to_record())
    assert again.cpd_v is None and again.cpd_sentence == a.cpd_sentence
    mean_figure(a)  # the figures draw without a V_cpd
    titles = [ax.get_title() for ax in maps_figure(a).axes]
    assert "contact potential − its mean, noise 4.8 mV per px" in titles  # about its own mean, in one panel's width


def test_the_split_carries_its_extrapolation_as_model_uncertainty(beyond):
    s, a = beyond
    # the parts still add up to the measured mean; each lies within its whole uncertainty (noise and model) of the
    # truth, and the model uncertainty is no longer a few mV's worth
    whole_es = np.hypot(a.electrostatic_mean_std_deg, a.electrostatic_mean_model_std_deg)
    whole_sr = np.hypot(a.short_range_mean_std_deg, a.short_range_mean_model_std_deg)
    assert np.all(np.abs(a.electrostatic_mean_deg - s.electrostatic_deg) <= 3.0 * whole_es)
    assert np.all(np.abs(a.short_range_mean_deg - s.short_range_deg) <= 3.0 * whole_sr)
    assert np.all(whole_sr > 10.0 * a.short_range_mean_std_deg)


def _means(cpd_v, heights_m=np.array([30e-9, 45e-9, 70e-9]), radius_m=30e-9, amplitude_m=10e-9):
    """Noise-free image means [N/m]: 1/2 C'' of the exact sphere series, averaged over the oscillation."""
    c2 = [giessibl_average(lambda z: 0.5 * second_derivative(lambda zz: sphere_capacitance(zz, radius_m), z)[0],
                           h + amplitude_m, amplitude_m) for h in heights_m]
    return np.asarray(c2)[:, None] * (BIASES[None] - cpd_v) ** 2 + 1e-6


def test_the_fit_of_the_means_finds_the_vertex_beyond_and_keeps_one_inside():
    # 1/2 C'' of a 30 nm sphere at 40 nm is of order 1e-12 F/m^2 (pi eps0 R / z scale: Hudlet et al. 1998)
    assert 0.1 < _means(0.0)[0, 1] / (np.pi * EPS0 * 30e-9 / 40e-9**2) < 10.0
    sd = np.full((3, 3), 1e-16)
    out = fit_mean_bias_grid(_means(-2.0), sd, bias_v=BIASES)
    assert out.cpd_v is None and out.cpd_std_v is None and not out.separable
    assert out.vertex_beyond_v == pytest.approx(-2.0, abs=1e-3)
    assert out.parameters[0] == pytest.approx(-2.0, abs=1e-6)  # the parabolas fitted at the vertex preferred
    inside = fit_mean_bias_grid(_means(0.35), sd, bias_v=BIASES)
    assert inside.cpd_v == pytest.approx(0.35, abs=1e-6) and inside.vertex_beyond_v is None and inside.separable
