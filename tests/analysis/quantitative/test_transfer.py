"""TTF estimation on synthetic reference images made from the analytic point-probe TTF (the outside reference:
mu0 (m k^2 - q k) exp(-k delta), Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53; Lohau et al. 1999, J. Appl. Phys.
86, 3410; both from memory), including non-periodic crops of a larger film."""

from __future__ import annotations

import numpy as np
import pytest

from assistant.analysis.quantitative import CalibrationInputError, calibrate_tip, calibrate_transfer, point_probe_ttf
from assistant.analysis.quantitative.fourier import half_plane_weight, ring_edges, ring_index, wavenumbers
from assistant.analysis.quantitative.transfer import gcv_tikhonov, ring_profile
from tests.analysis.quantitative.conftest import REF, TIP
from tests.analysis.quantitative.synthetic import make_image


def _ring_errors(est) -> np.ndarray:
    b = est.in_band
    return est.ttf_n_per_a[b] / point_probe_ttf(est.k_per_m[b], **TIP) - 1.0


def _calibrate(syn, **kw):
    return calibrate_transfer(syn.gradient_n_per_m, pixel_m=REF["pixel_m"], ms_a_per_m=REF["ms"],
                              thickness_m=REF["thickness_m"], height_m=REF["height_m"], **kw)


def test_ttf_recovered_in_band_on_a_periodic_image(periodic_reference):
    est = _calibrate(periodic_reference, periodic=True)
    err = np.abs(_ring_errors(est))
    # measured: median 0.9 %, 90th percentile 3.6 %, worst ring 7 % (noise 1e-4 N/m against 4e-3 N/m of signal)
    assert np.median(err) < 0.02 and np.percentile(err, 90) < 0.05 and err.max() < 0.12
    lo, hi = est.band_periods_m
    assert lo <= 50e-9 and hi >= 400e-9


def test_ttf_recovered_in_band_on_a_non_periodic_crop(crop_reference):
    est = _calibrate(crop_reference)
    err = np.abs(_ring_errors(est))
    # measured: median 1.2-2.4 %, 90th percentile 4-5 %, worst ring 6-10 % over seeds
    assert np.median(err) < 0.03 and np.percentile(err, 90) < 0.06 and err.max() < 0.15
    assert est.band_periods_m[1] <= 192 * 10e-9 / 6 + 1e-12   # windowed scans: periods up to a sixth of the scan


def test_a_tilted_baseline_leaves_the_ttf_as_it_was(crop_reference):
    # a sloping phase baseline (2 mN/m across the scan, half the film's signal rms) is a plane, which the
    # windowed estimate takes out with the mean; before, it leaked into the pattern and the rings (this crop was
    # refused: "the valid band is too narrow", 160-240 nm; on other seeds a 1 mN/m tilt flipped the dipole's sign)
    rows, cols = np.indices(crop_reference.gradient_n_per_m.shape)
    tilt = 2e-3 * (cols / cols.max() - 0.5) - 1e-3 * (rows / rows.max() - 0.5)
    plain = _calibrate(crop_reference)
    tilted = calibrate_transfer(crop_reference.gradient_n_per_m + tilt, pixel_m=REF["pixel_m"], ms_a_per_m=REF["ms"],
                                thickness_m=REF["thickness_m"], height_m=REF["height_m"])
    b = plain.in_band
    np.testing.assert_allclose(tilted.ttf_n_per_a[b], plain.ttf_n_per_a[b], rtol=1e-6)


def test_an_image_the_film_model_does_not_fit_is_flagged(crop_reference):
    # a smooth bump of 3 mN/m (a background no plane takes out) leaves the film model 5.5 x the noise (a clean
    # reference: 1.9): the calibration warns and does not call the point-probe fit determined
    rows, cols = np.indices(crop_reference.gradient_n_per_m.shape)
    bump = 3e-3 * np.exp(-((rows - 80) ** 2 + (cols - 110) ** 2) / (2 * 25.0**2))
    kw = dict(pixel_m=REF["pixel_m"], ms_a_per_m=REF["ms"], thickness_m=REF["thickness_m"], plane_m=REF["height_m"],
              bootstrap=False)
    clean = calibrate_tip(crop_reference.gradient_n_per_m, **kw)
    assert clean.warnings == () and clean.to_dict()["point_probe_determined"]
    doubtful = calibrate_tip(crop_reference.gradient_n_per_m + bump, **kw).to_dict()
    assert doubtful["warnings"] and "× the noise" in doubtful["warnings"][0]
    assert not doubtful["point_probe_determined"] and doubtful["point_probe_verdict"].startswith("not trusted")


def test_the_warning_judges_the_pattern_that_was_kept(crop_reference):
    # the refinement keeps the round with the smallest residual; a last round that came out worse was quoted and
    # judged instead (on the simulated reference film: 5.9 x the noise quoted for the 5.0 of the pattern kept)
    import dataclasses

    cal = calibrate_tip(crop_reference.gradient_n_per_m, pixel_m=REF["pixel_m"], ms_a_per_m=REF["ms"],
                        thickness_m=REF["thickness_m"], plane_m=REF["height_m"], bootstrap=False)

    def with_rounds(*r):
        return dataclasses.replace(cal, transfer=dataclasses.replace(cal.transfer, residual_rms=r))

    assert with_rounds(5.0, 3.5, 4.6).warnings == ()
    assert "residual of 4.5 × the noise" in with_rounds(6.0, 4.5, 5.2).warnings[0]


def test_refining_the_pattern_helps(periodic_reference):
    # A plain sign pattern (here already with walls placed inside pixels) biases the TTF low; alternating TTF and
    # pattern estimates removes most of it (measured here: plain sign -3 % median, refined +0.2 %).
    plain = _ring_errors(_calibrate(periodic_reference, periodic=True, refine=False))
    refined = _ring_errors(_calibrate(periodic_reference, periodic=True))
    assert np.median(plain) < -0.02                      # measured -3.1 %
    assert abs(np.median(refined)) < 0.01               # measured +0.2 %
    assert np.median(np.abs(refined)) < 0.5 * np.median(np.abs(plain))   # measured 0.9 % against 4.0 %


def test_tip_moment_down_reverses_the_ttf():
    # the same tip turned over: the image inverts, and with --tip-moment down the pattern is read the other way
    syn = make_image(n=128, oversample=4, seed=1, tip_sign=-1.0, **REF, **TIP)
    est = _calibrate(syn, periodic=True, tip_moment="down")
    b = est.in_band
    ratio = est.ttf_n_per_a[b] / -point_probe_ttf(est.k_per_m[b], **TIP)
    assert np.median(np.abs(ratio - 1.0)) < 0.02


def test_flat_image_is_refused():
    rng = np.random.default_rng(3)
    with pytest.raises(CalibrationInputError, match="no domains"):
        calibrate_transfer(1e-4 * rng.standard_normal((64, 64)), pixel_m=10e-9, ms_a_per_m=6e5,
                           thickness_m=12e-9, height_m=20e-9)


def test_band_too_narrow_is_refused():
    # a 240 nm scan holds periods from a third of it (80 nm) to four pixels (40 nm): four rings, too few
    syn = make_image(n=24, oversample=4, seed=4, **{**REF, "noise_n_per_m": 1e-5}, **TIP)
    with pytest.raises(CalibrationInputError, match="too narrow"):
        _calibrate(syn, periodic=True)


def test_gcv_choice_is_near_the_smallest_predictive_risk():
    # Generalised cross-validation estimates the alpha that minimises the predictive risk |K (x_alpha - x)|^2
    # (Golub, Heath & Wahba 1979, Technometrics 21, 215; from memory): on a per-component problem with a kernel
    # falling over four decades, the GCV alpha should give a risk within 20 % of the best one.
    rng = np.random.default_rng(5)
    n = 4000
    kernel = np.exp(-np.linspace(0, 9, n))
    x = rng.standard_normal(n)
    data = kernel * x + 0.01 * rng.standard_normal(n)
    alphas = np.logspace(-9, 1, 400)
    risk = [np.sum((kernel * (kernel * data / (kernel ** 2 + a)) - kernel * x) ** 2) for a in alphas]
    a_gcv = gcv_tikhonov(data, kernel, np.ones(n))
    risk_gcv = np.sum((kernel * (kernel * data / (kernel ** 2 + a_gcv)) - kernel * x) ** 2)
    assert risk_gcv < 1.2 * min(risk)


def test_the_ring_fit_standard_error_matches_the_scatter_of_the_fit():
    # data = 2 H + white noise over a fixed random H, 300 noise draws: the standard error each fit states agrees
    # with the scatter of the fitted factors (median ratio over rings 1.00 here). Before, a conjugate pair
    # entered the variance as two independent values and the stated error was 1.41 x too small.
    rng = np.random.default_rng(0)
    shape, pixel = (64, 64), 10e-9
    h = np.fft.rfft2(rng.standard_normal(shape))
    k = wavenumbers(shape, pixel)[2]
    dk, _ = ring_edges(shape, pixel)
    rings = ring_index(k, dk)
    n = int(rings.max()) + 1
    fits = [ring_profile(2.0 * h + np.fft.rfft2(rng.standard_normal(shape)), h, rings, half_plane_weight(shape), n)
            for _ in range(300)]
    t, std = np.array([f[0] for f in fits]), np.array([f[1] for f in fits])
    ratio = np.std(t, axis=0, ddof=1)[3:25] / np.mean(std, axis=0)[3:25]
    assert 0.93 < np.median(ratio) < 1.07, np.median(ratio)


def test_the_tukey_window_inflates_the_variance_as_its_fourth_moment_says():
    # N sum w^4 / (sum w^2)^2: 1 for no window, 1.42 for the 30 % Tukey window the windowed estimate uses
    from assistant.analysis.quantitative.fourier import tukey_2d
    from assistant.analysis.quantitative.transfer import TAPER_FRACTION, window_variance_factor

    assert window_variance_factor(np.ones((32, 48))) == pytest.approx(1.0)
    assert window_variance_factor(tukey_2d((256, 256), TAPER_FRACTION)) == pytest.approx(1.42, abs=0.01)
