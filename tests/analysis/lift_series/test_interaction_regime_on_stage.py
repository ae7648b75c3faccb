"""The interaction regime of small lift-height series on the simulated stage, end to end through the procedures
(calibrate, approach, series with a bias grid and the repeat pass, analysis).

What each film is, in the trade's terms (Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53, on tip-induced
perturbations; from memory): a hard film the tip cannot switch shows its stray field alone; a soft film's
induced moment attracts the tip over domains of either sign and recovers once the tip has passed; a
low-coercivity film is rewritten by the tip's field. The scenarios only say which film is which; the regime
is read from the series alone.
"""

from __future__ import annotations

import numpy as np
import pytest

from assistant.procedures.calibrate import CalibrationSettings
from assistant.procedures.series import SeriesSettings
from assistant.procedures.workflow import Workflow
from drivers.registry import open_controller

EXPECTED = {"default": "negligible", "soft-film": "reversible", "low-coercivity": "irreversible"}


@pytest.fixture(scope="module", params=sorted(EXPECTED))
def run(request, tmp_path_factory):
    path = tmp_path_factory.mktemp("regime") / "session.h5"
    with open_controller("sim://", scenario=request.param, seed=1) as ctl:
        wf = Workflow(ctl, path)
        try:
            wf.calibrate(CalibrationSettings(temperature_k=298.15, thermal_seconds=0.5))
            wf.approach()
            # small and fast: 10 lines of 32 pixels over 1.6 um, three heights, three biases, the repeat pass
            wf.series(SeriesSettings(heights_m=(10e-9, 20e-9, 40e-9), biases_v=(-0.5, 0.3, 1.0), lines=10,
                                     pixels=32, scan_size_m=1.6e-6))
            analysis = wf.analyse()
        finally:
            wf.close()
    return request.param, analysis


def test_each_film_gets_its_regime(run):
    name, a = run
    d = a.to_dict()
    assert d["interaction_regime"] == EXPECTED[name], d["interaction_evidence"]
    assert d["interaction_evidence"].split(":")[0].lower() == EXPECTED[name]
    assert any(ch.isdigit() for ch in d["interaction_evidence"])


def test_the_noise_is_the_stages_thermal_noise_whatever_the_regime(run):
    # the stage's second-pass noise is the thermal limit (Albrecht et al. 1991; tests/simulated_stage/
    # test_instrument.py); a rewritten film leaves no unchanged repeat to measure it, and the top image's
    # high-frequency band holds magnetic content on these coarse lines (it read 3.6 x the limit on the
    # low-coercivity film): the two top-height passes that differ in bias alone measure it instead
    name, a = run
    assert a.noise.verdict == "thermal_limit", (name, a.noise.sentence)
    assert 0.8 < a.noise.ratio < 1.5


def test_recommendation_follows_the_regime(run):
    name, a = run
    r = a.interaction
    if name == "default":
        # negligible from some height up, and the advice is never below it
        assert r.lowest_negligible_m is not None
        assert a.recommendation.lift_height_m is None or a.recommendation.lift_height_m >= r.lowest_negligible_m
        assert f"negligible from {r.lowest_negligible_m * 1e9:.4g} nm" in a.recommendation.sentence
    elif name == "low-coercivity":
        assert a.recommendation.lift_height_m is None and a.to_dict()["tip_changed_sample"] is True
    else:
        # the soft film attracts the tip at every measured height by more than a tenth of its contrast
        assert not r.negligible_at.any() and a.recommendation.lift_height_m is None
        assert np.all(r.even_mean_deg > 0)
