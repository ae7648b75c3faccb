"""The field-series analysis against independent references: the loop of non-interacting elements with normally
distributed switching fields, and synthetic image stacks built from the published thin-film field formula and a
point-probe tip (tests/analysis/synthetic_loop.py), with known switching fields, noise, drift and tip reversals."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

sys.path.insert(0, str(Path(__file__).parent))
from synthetic_loop import loop_fields, make_loop_stack, match, true_states  # noqa: E402

from assistant.analysis.field_series import (LoopInputError, analyse_loop, branches, fit_intervals,  # noqa: E402
                                             fit_loop, normal_loop, sheppard_sigma, switching, tagawa_sigma)

STEP = 25e3


def test_counted_loop_follows_the_normal_cdf_and_both_fits_agree():
    # Independent, non-interacting elements with switching fields N(Hc, sigma^2), each reversing when the field
    # along its reversal direction reaches its switching field (Stoner-Wohlfarth along the easy axis, textbook):
    # descending branch M/Ms = 1 - 2 Phi(-(H + Hc)/sigma). Phi from scipy.stats (the reference library).
    rng = np.random.default_rng(11)
    hc, sigma, n = 300e3, 40e3, 600
    h_sw = rng.normal(hc, sigma, n)
    fields = loop_fields(500e3, 10e3)
    states = true_states(fields, h_sw)
    m = states.mean(axis=1)
    down = branches(fields)[0]
    seg = slice(down.start, down.end + 1)
    expected = 1 - 2 * stats.norm.cdf(-(fields[seg] + hc) / sigma)
    binomial = 2 * np.sqrt(np.clip((1 - expected**2) / 4, 1e-12, None) / n)  # sd of 2p - 1 for n elements
    assert np.all(np.abs(m[seg] - expected) <= 4 * binomial + 1e-12)
    np.testing.assert_allclose(normal_loop(fields[seg], hc, sigma), expected, atol=1e-12)
    fit = fit_loop(fields[seg], m[seg], direction=-1)
    counted = fit_intervals(*(lambda s: (s.low, s.high))(switching(states.astype(np.int8), fields, down)))
    # both estimates recover the population within sampling error (sd of a mean sigma/sqrt(n), of a spread
    # sigma/sqrt(2n)), and the sample's own mean and spread closely
    for est_mean, est_sigma in ((fit.coercive, fit.sigma), (counted.mean, counted.sigma)):
        assert abs(est_mean - hc) < 3 * sigma / np.sqrt(n)
        assert abs(est_sigma - sigma) < 3 * sigma / np.sqrt(2 * n)
    assert abs(counted.mean - h_sw.mean()) < 0.2 * 10e3 / np.sqrt(12)
    assert abs(counted.sigma - h_sw.std(ddof=1)) < 0.03 * sigma
    assert counted.mean_std == pytest.approx(sigma / np.sqrt(n), rel=0.15)
    assert abs(fit.coercive - counted.mean) < 2e3 and abs(fit.sigma - counted.sigma) < 3e3


def test_sheppard_correction_removes_the_step_width():
    # Sheppard 1898: values grouped on a grid of width w have variance sigma^2 + w^2/12.
    rng = np.random.default_rng(2)
    x = rng.normal(0.0, 40e3, 20000)
    w = 50e3
    low = np.floor(x / w) * w
    assert sheppard_sigma(low, low + w) == pytest.approx(40e3, rel=0.02)
    assert np.std(low + w / 2) > 1.03 * 40e3  # uncorrected, clearly too wide


def _mean_field_curves(step: float, alpha: float, n: int = 4000, hr: float = -310e3):
    """Major loop and a recoil curve of elements with N(300, 30^2) kA/m switching fields coupled by a mean field
    alpha M (solved self-consistently at every field)."""
    rng = np.random.default_rng(0)
    h_sw = rng.normal(300e3, 30e3, n)

    def run(fields):
        s, out = np.ones(n), []
        for h in fields:
            while True:
                new = np.where(h + alpha * s.mean() <= -h_sw, -1.0, np.where(h + alpha * s.mean() >= h_sw, 1.0, s))
                if np.array_equal(new, s):
                    break
                s = new
            out.append(s.mean())
        return np.array(out)

    down = np.arange(500e3, -500e3 - 1, -step)
    major = np.r_[down, down[-2::-1]]
    to_r = np.arange(500e3, hr - 1, -step)
    recoil = np.r_[to_r, np.arange(hr + step, 500e3 + 1, step)]
    return major, run(major), recoil, run(recoil), down.size - 1, to_r.size - 1, h_sw


def test_tagawa_delta_h_removes_a_mean_interaction_field():
    # Tagawa et al. 1991 (IEEE Trans. Magn. 27, 4975; from memory): at equal M the field difference between the
    # major ascending branch and a recoil curve cancels a mean interaction field. With alpha = -100 kA/m the
    # counted switching fields of the major loop spread far wider than the intrinsic 30 kA/m.
    major, m_major, recoil, m_recoil, turn, turn_r, h_sw = _mean_field_curves(2e3, -100e3)
    sigma, se, used = tagawa_sigma(major[turn:], m_major[turn:], recoil[turn_r:], m_recoil[turn_r:])
    assert used > 20
    assert sigma == pytest.approx(h_sw.std(), rel=0.04)
    fit = fit_loop(major[: turn + 1], m_major[: turn + 1], direction=-1)  # the spread the loop's slope shows
    assert fit.sigma > 2 * h_sw.std()
    # without interactions the method returns the spread as well
    major, m_major, recoil, m_recoil, turn, turn_r, h_sw = _mean_field_curves(2e3, 0.0)
    assert tagawa_sigma(major[turn:], m_major[turn:], recoil[turn_r:], m_recoil[turn_r:])[0] == pytest.approx(
        h_sw.std(), rel=0.03)


@pytest.fixture(scope="module")
def stack():
    return make_loop_stack(seed=3, rows=128, cols=128)


@pytest.fixture(scope="module")
def analysed(stack):
    return analyse_loop(stack.phase_deg, stack.field_a_per_m, topography_m=stack.topography_m, pixel_m=20e-9)


def _matched(result, stack):
    m = match(result.elements.centroids_px, stack.centres_px)
    assert np.all(m >= 0)
    return m


def test_synthetic_stack_switching_fields_within_one_step(stack, analysed):
    m = _matched(analysed, stack)
    assert analysed.count >= 20
    truth = stack.switching_a_per_m[m]
    down = -analysed.switching_fields_a_per_m("down")
    up = analysed.switching_fields_a_per_m("up")
    # the first step found reversed is the first step at or beyond the true switching field
    for got in (down, up):
        assert np.all((got - truth >= 0) & (got - truth < STEP))
    # the drift (up to a few pixels over the series) was registered
    assert np.max(np.abs(analysed.drift_px - stack.drift_px)) < 0.25
    assert np.max(np.hypot(*stack.drift_px.T)) > 2.0


def test_synthetic_stack_coercive_field_and_spread(stack, analysed):
    truth = stack.switching_a_per_m[_matched(analysed, stack)]
    n = truth.size
    assert analysed.coercive_a_per_m == pytest.approx(truth.mean(), rel=0.03)
    # the spread of these elements, within the sampling error of a spread estimated from n values
    assert abs(analysed.sfd_sigma_a_per_m - truth.std(ddof=1)) < 2 * truth.std(ddof=1) / np.sqrt(2 * n)
    assert analysed.sfd_sigma_std_a_per_m > 0
    d = analysed.to_dict()
    assert d["dots"] == n and len(d["switching_fields_ka_per_m"]) == n
    assert d["loop_m_over_ms"][0] == 1.0 and min(d["loop_m_over_ms"]) == -1.0 and d["loop_m_over_ms"][-1] == 1.0


def test_synthetic_stack_tip_reversal_found(stack, analysed):
    # the tip (coercive field 200 kA/m) reverses at the first step beyond -200 and beyond +200 kA/m
    assert analysed.to_dict()["tip_reversals_ka_per_m"] == [-225.0, 225.0]
    assert analysed.to_dict()["tip_switched_elements"] == []
    np.testing.assert_array_equal(analysed.tip, stack.tip)


def test_tip_reversal_in_the_middle_of_the_switching():
    st = make_loop_stack(seed=4, rows=96, cols=96, tip_coercive=290e3, drift_step_px=0.1)
    r = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m)
    m = _matched(r, st)
    assert r.to_dict()["tip_reversals_ka_per_m"] == [-300.0, 300.0]
    np.testing.assert_array_equal(r.states, st.states[:, m].astype(np.int8))


def test_tip_switched_element_is_found_and_where():
    kw = dict(seed=5, rows=80, cols=80, drift_step_px=0.1, fields=loop_fields(450e3, 50e3))
    base = make_loop_stack(**kw)
    inside = np.flatnonzero(np.all((base.centres_px > 12) & (base.centres_px < 68), axis=1))
    dot = int(inside[0])
    step = int(np.argmax(base.states[:, dot] < 0)) - 1  # the field reverses it at the next step
    row = int(round(base.centres_px[dot, 0]))
    st = make_loop_stack(**kw, tip_switch=(dot, step, row))
    with_repeat = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m,
                               repeat_phase_deg=st.repeat_phase_deg)
    e = int(np.flatnonzero(match(with_repeat.elements.centroids_px, st.centres_px) == dot)[0])
    assert [(s.element, s.step, s.during) for s in with_repeat.tip_switches] == [(e, step, "lift pass")]
    assert with_repeat.to_dict()["tip_switched_elements"] == [e]
    assert with_repeat.switching_fields_a_per_m("down")[e] == st.field_a_per_m[step]
    assert any("larger lift height" in n for n in with_repeat.notes)
    alone = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m)
    assert [(s.element, s.step, s.during) for s in alone.tip_switches] == [(e, step, "first pass")]


def test_elements_from_the_magnetic_contrast_when_the_topography_is_flat(stack, analysed):
    flat = analyse_loop(stack.phase_deg, stack.field_a_per_m, topography_m=np.zeros(stack.topography_m.shape))
    assert flat.elements.source == "magnetic"
    m = match(flat.elements.centroids_px, stack.centres_px)
    assert np.all(m >= 0) and flat.count >= analysed.count - 4
    truth = stack.switching_a_per_m[m]
    got = -flat.switching_fields_a_per_m("down")
    assert np.all((got - truth >= 0) & (got - truth < STEP))


def test_bad_stacks_are_refused_by_name(stack):
    phase, h = stack.phase_deg, stack.field_a_per_m
    with pytest.raises(LoopInputError, match="at least 3 field steps"):
        analyse_loop(phase[:2], h[:2])
    with pytest.raises(LoopInputError, match="field axis"):
        analyse_loop(phase, h[:-1])
    with pytest.raises(LoopInputError, match="same at every step"):
        analyse_loop(phase, np.full(h.size, 1e5))
    noise = np.random.default_rng(0).normal(0, 0.05, phase.shape)
    with pytest.raises(LoopInputError, match="no elements found"):
        analyse_loop(noise, h, topography_m=np.random.default_rng(1).normal(0, 1e-10, phase.shape[1:]))
    with pytest.raises(LoopInputError, match="topography_m has shape"):
        analyse_loop(phase, h, topography_m=np.zeros((3, 3)))


def test_a_tip_magnetised_down_reads_the_other_way():
    # A tip along -z from the start (its coercive field beyond the loop here) gives every element the opposite
    # contrast: the same states once the analysis is told so (F' = mu0 m d2Hz/dz2 changes sign with m).
    st = make_loop_stack(seed=6, rows=64, cols=64, tip_coercive=1e7, fields=loop_fields(450e3, 50e3))
    up = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m)
    down = analyse_loop(-st.phase_deg, st.field_a_per_m, topography_m=st.topography_m, tip_moment="down")
    assert up.tip_reversal_steps == () == down.tip_reversal_steps
    np.testing.assert_array_equal(up.states, down.states)
    assert up.states[0].min() == 1 and up.states[st.field_a_per_m.argmin()].max() == -1


def test_a_virgin_branch_is_no_recoil_curve():
    # Tagawa et al. 1991 (IEEE Trans. Magn. 27, 4975; from memory): a recoil curve turns on the descending branch
    # that came down from positive saturation. A series that starts from the as-grown state (elements up or down
    # at random) at zero field and rises to saturation first has an ascending branch from M/Ms near 0 that is
    # none: the non-interacting elements' spread must not be "corrected" with it.
    virgin = np.arange(0, 450e3, STEP)
    loop = loop_fields(450e3, STEP)
    st = make_loop_stack(seed=3, rows=128, cols=128, fields=np.r_[virgin, loop], virgin=True)
    r = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m)
    assert abs(r.m_over_ms[0]) < 0.5 and r.m_over_ms[virgin.size] == 1.0
    assert np.isnan(r.tagawa_sigma_a_per_m) and not any("recoil" in n for n in r.notes)
    # the same series with a recoil curve from -300 kA/m after the loop: that one is taken
    recoil = np.r_[np.arange(425e3, -300e3 - 1, -STEP), np.arange(-275e3, 450e3 + 1, STEP)]
    st = make_loop_stack(seed=3, rows=128, cols=128, fields=np.r_[virgin, loop, recoil], virgin=True)
    r = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m)
    assert [n for n in r.notes if "recoil" in n][0].startswith("recoil branch from -300 kA/m")
    truth = st.switching_a_per_m[_matched(r, st)].std(ddof=1)
    assert abs(r.tagawa_sigma_a_per_m - truth) < 3 * r.tagawa_sigma_std_a_per_m
    d = r.to_dict()
    assert (d["tagawa_sigma_ka_per_m"], d["tagawa_sigma_std_ka_per_m"]) == (r.tagawa_sigma_a_per_m / 1e3,
                                                                         r.tagawa_sigma_std_a_per_m / 1e3)


def _both_branches_within_one_step(result, st, step):
    truth = st.switching_a_per_m[_matched(result, st)]
    for got in (-result.switching_fields_a_per_m("down"), result.switching_fields_a_per_m("up")):
        assert np.all((got - truth >= 0) & (got - truth < step))
    assert abs(result.coercive_a_per_m - truth.mean()) < 3 * result.coercive_std_a_per_m


def test_a_series_from_negative_saturation_finds_the_tip_pointing_down():
    # The series starts at -450 kA/m: the tip's coating (coercive field 200 kA/m) and the elements point along
    # -z, and the tip reverses on the way up. Unless told, the analysis takes the tip's start direction under
    # which the elements follow the field.
    st = make_loop_stack(seed=3, rows=128, cols=128, fields=-loop_fields(450e3, STEP))
    assert st.tip[0] == -1 and st.states[0].max() == -1
    r = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m)
    assert r.tip[0] == -1 and r.to_dict()["tip_reversals_ka_per_m"] == [225.0, -225.0]
    assert any("along -z (down) at the first step" in n for n in r.notes)
    assert r.notes[0].startswith(f"{r.count} elements found")  # the summaries show the first note on its own line
    assert not any("not saturated" in n for n in r.notes)
    _both_branches_within_one_step(r, st, STEP)
    # told the tip pointed up, the analysis does as told (and finds no switching on the ascending branch)
    told = analyse_loop(st.phase_deg, st.field_a_per_m, topography_m=st.topography_m, tip_moment="up")
    assert told.tip[0] == 1 and np.all(np.isnan(told.switching_fields_a_per_m("up")))


def test_a_tip_pointing_down_throughout_is_found_from_the_states():
    # A tip whose coercive field lies beyond the loop, along +z in one stack and along -z in the other (every
    # phase inverted, F' = mu0 m d2Hz/dz2 changes sign with m): the same states and switching fields either way.
    fields = -loop_fields(450e3, 50e3)
    st = make_loop_stack(seed=6, rows=96, cols=96, tip_coercive=1e7, fields=fields)
    up = analyse_loop(st.phase_deg, fields, topography_m=st.topography_m)
    down = analyse_loop(-st.phase_deg, fields, topography_m=st.topography_m)
    assert up.tip_reversal_steps == () == down.tip_reversal_steps
    assert np.all(up.tip == 1) and np.all(down.tip == -1)
    np.testing.assert_array_equal(up.states, down.states)
    assert any("along -z (down)" in n for n in down.notes) and not any("along -z (down)" in n for n in up.notes)
    for r in (up, down):
        _both_branches_within_one_step(r, st, 50e3)
