"""Stray field of a sample under test from a TTF calibrated on a different (synthetic) reference.

Truth: the sample's field by the Fourier-space formula of a perpendicular film (Hug et al. 1998; checked against
magpylib in test_reference_field.py), band-passed over the whole film with the map's band filter; the image is made
with the analytic point-probe TTF. Sample and reference differ in domain size, Ms, thickness and plane."""

from __future__ import annotations

import numpy as np
import pytest

from assistant.analysis.quantitative import (FieldInputError, amplitude_weight, band_taper, calibrate_tip,
                                             film_field, point_probe_ttf, reconstruct_field)
from assistant.analysis.quantitative.fourier import wavenumbers
from tests.analysis.quantitative.conftest import REF, TIP
from tests.analysis.quantitative.synthetic import make_image


@pytest.fixture(scope="module")
def calibration(crop_reference):
    # the synthetic reference's Ms and t are exact: no uncertainty for them here, so the coverage test sees the
    # method's own errors
    return calibrate_tip(crop_reference.gradient_n_per_m, pixel_m=REF["pixel_m"], ms_a_per_m=REF["ms"],
                         thickness_m=REF["thickness_m"], plane_m=REF["height_m"], ms_std_a_per_m=0.0,
                         thickness_std_m=0.0)


def _map(cal, syn, plane, **kw):
    return reconstruct_field(syn.gradient_n_per_m, pixel_m=syn.pixel_m, plane_m=plane,
                             ring_k_per_m=cal.transfer.k_per_m, ttf_n_per_a=cal.ttf_n_per_a,
                             ttf_std_n_per_a=cal.ttf_unc_n_per_a, band_k_per_m=cal.transfer.band_k_per_m,
                             ring_correlation=cal.ring_correlation, **kw)


def _interior(a, m):
    return a[m:a.shape[0] - m, m:a.shape[1] - m]


@pytest.fixture(scope="module")
def sample_map(calibration, crop_sample):
    fm = _map(calibration, crop_sample, 30e-9)
    truth = crop_sample.hz_in_band(fm.band_k_per_m, band_taper)
    return fm, truth


def test_sample_field_correlates_and_has_the_right_rms(sample_map):
    fm, truth = sample_map
    a, b = _interior(fm.hz_a_per_m, fm.margin_px), _interior(truth, fm.margin_px)
    # measured: correlation 0.999, rms ratio 0.99-1.02 over seeds
    assert np.corrcoef(a.ravel(), b.ravel())[0, 1] >= 0.95
    assert abs(a.std() / b.std() - 1.0) <= 0.10


def test_uncertainty_map_covers_the_truth(sample_map):
    fm, truth = sample_map
    z = _interior((fm.hz_a_per_m - truth) / fm.hz_std_a_per_m, fm.margin_px)
    # nominal 95 % inside two standard uncertainties; one image's pixels are correlated, so allow 0.85-0.995
    assert 0.85 <= np.mean(np.abs(z) < 2.0) <= 0.995


def test_continuation_to_a_higher_plane(calibration, crop_sample):
    higher = make_image(n=192, oversample=2, pixel_m=10e-9, period_m=350e-9, ms=9e5, thickness_m=20e-9,
                        height_m=55e-9, noise_n_per_m=1e-4, seed=102, crop=(384, 40, 90), **TIP)  # same film
    fm = _map(calibration, crop_sample, 30e-9, height_m=55e-9)
    truth = higher.hz_in_band(fm.band_k_per_m, band_taper)
    a, b = _interior(fm.hz_a_per_m, fm.margin_px), _interior(truth, fm.margin_px)
    assert fm.height_m == 55e-9
    assert np.corrcoef(a.ravel(), b.ravel())[0, 1] >= 0.98 and abs(a.std() / b.std() - 1) < 0.05


def test_plane_below_the_measurement_is_refused(calibration, crop_sample):
    with pytest.raises(FieldInputError, match="upwards"):
        _map(calibration, crop_sample, 30e-9, height_m=20e-9)


def test_band_the_image_cannot_hold_is_refused(calibration, crop_sample):
    coarse = crop_sample.gradient_n_per_m[::8, ::8]          # 80 nm pixels: nothing shorter than 160 nm
    with pytest.raises(FieldInputError, match="does not overlap"):
        reconstruct_field(coarse[:16, :16], pixel_m=80e-9, plane_m=30e-9, ring_k_per_m=calibration.transfer.k_per_m,
                          ttf_n_per_a=calibration.ttf_n_per_a, ttf_std_n_per_a=calibration.ttf_unc_n_per_a,
                          band_k_per_m=(2 * np.pi / 60e-9, 2 * np.pi / 40e-9))


def test_amplitude_difference_is_carried_over():
    # TTF measured at 8 nm amplitude, sample imaged at 25 nm: the oscillation weights differ by up to 20 % in the
    # band; with both amplitudes the map is right, without them it is not (Giessibl 2001 weights, from memory)
    ref = make_image(n=128, oversample=4, seed=1, amplitude_m=8e-9, **REF, **TIP)
    cal = calibrate_tip(ref.gradient_n_per_m, pixel_m=10e-9, ms_a_per_m=REF["ms"], thickness_m=REF["thickness_m"],
                        plane_m=REF["height_m"], amplitude_m=8e-9, periodic=True, ms_std_a_per_m=0,
                        thickness_std_m=0, bootstrap=False)
    sam = make_image(n=128, oversample=4, pixel_m=10e-9, period_m=300e-9, ms=9e5, thickness_m=20e-9,
                     height_m=30e-9, noise_n_per_m=1e-4, seed=7, amplitude_m=25e-9, **TIP)
    kw = dict(pixel_m=10e-9, plane_m=30e-9, ring_k_per_m=cal.transfer.k_per_m, ttf_n_per_a=cal.ttf_n_per_a,
              ttf_std_n_per_a=cal.ttf_unc_n_per_a, band_k_per_m=cal.transfer.band_k_per_m, periodic=True, draws=8)
    right = reconstruct_field(sam.gradient_n_per_m, amplitude_m=25e-9, ttf_amplitude_m=8e-9, **kw)
    wrong = reconstruct_field(sam.gradient_n_per_m, **kw)
    truth = sam.hz_in_band(right.band_k_per_m, band_taper)
    assert abs(right.hz_a_per_m.std() / truth.std() - 1) < 0.03
    assert wrong.hz_a_per_m.std() / truth.std() < 0.93
    # sanity of the weight itself: smaller at larger amplitude
    assert amplitude_weight(np.array([5e7]), 25e-9)[0] < amplitude_weight(np.array([5e7]), 8e-9)[0]


@pytest.mark.slow
def test_coverage_over_many_samples():
    # six independent reference/sample pairs, 256 x 256: the 2-sigma coverage beyond the margin averages 95 %
    covers, ratios = [], []
    for seed in range(6):
        ref = make_image(n=256, oversample=2, seed=10 + seed, crop=(512, 85, 128), **REF, **TIP)
        cal = calibrate_tip(ref.gradient_n_per_m, pixel_m=10e-9, ms_a_per_m=REF["ms"], thickness_m=REF["thickness_m"],
                            plane_m=REF["height_m"], ms_std_a_per_m=0.0, thickness_std_m=0.0)
        sam = make_image(n=256, oversample=2, pixel_m=10e-9, period_m=350e-9, ms=9e5, thickness_m=20e-9,
                         height_m=30e-9, noise_n_per_m=1e-4, seed=110 + seed, crop=(512, 40, 90), **TIP)
        fm = _map(cal, sam, 30e-9)
        truth = sam.hz_in_band(fm.band_k_per_m, band_taper)
        z = _interior((fm.hz_a_per_m - truth) / fm.hz_std_a_per_m, fm.margin_px)
        covers.append(np.mean(np.abs(z) < 2.0))
        ratios.append(_interior(fm.hz_a_per_m, fm.margin_px).std() / _interior(truth, fm.margin_px).std())
    assert 0.90 <= np.mean(covers) <= 0.99, covers
    assert np.all(np.abs(np.array(ratios) - 1) < 0.05), ratios


def test_point_probe_ttf_reference_values():
    # the analytic TTF the synthetic images use, at one k: mu0 (m k^2 - q k) exp(-k delta)
    k = 5e7
    expected = 1.25663706127e-6 * (1e-16 * k * k + 3e-9 * k) * np.exp(-k * 30e-9)
    assert point_probe_ttf(np.array([k]), **TIP)[0] == pytest.approx(expected, rel=1e-12)


def _triangle_slopes(x: np.ndarray, period: float) -> np.ndarray:
    """Cell averages of a square wave of +-1 with walls at +-period/4 (the stripes of the reference check)."""
    def ramp(u):
        v = np.mod(u + period / 4, period)
        return np.where(v < period / 2, v, period - v) - period / 4
    step = x[1] - x[0]
    return (ramp(x + step / 2) - ramp(x - step / 2)) / step


@pytest.mark.parametrize(("height_m", "expected_n_per_m"), [(20e-9, -1.50052e-3), (50e-9, 1.02301e-3),
                                                             (100e-9, 1.42905e-3), (200e-9, 3.67822e-4)])
def test_film_field_and_point_dipole_ttf_give_the_published_stripe_gradient(height_m, expected_n_per_m):
    # An outside check of the TTF's sign and factors together with the film's field: a point dipole
    # m_z = 1e-16 A m^2 (Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53) over the centre of a domain of
    # perpendicular stripes, period 400 nm, Ms 800 kA/m, 50 nm thick, sharp walls. The expected F' comes from the
    # closed-form stripe series, confirmed by second differences of magpylib's field (Ortner & Coliado Bandeira
    # 2020, SoftwareX 11, 100466) to 4e-4 at 20 nm.
    pixel, period = 2e-9, 400e-9
    x = (np.arange(round(period / pixel)) + 0.5) * pixel - period / 2
    pattern = np.tile(_triangle_slopes(x, period), (4, 1))
    hz = film_field(pattern, ms_a_per_m=8e5, thickness_m=50e-9, height_m=height_m, pixel_m=pixel)
    k = wavenumbers(pattern.shape, pixel)[2]
    ttf = point_probe_ttf(k, moment_a_m2=1e-16, monopole_a_m=0.0, offset_m=0.0)
    gradient = np.fft.irfft2(np.fft.rfft2(hz) * ttf, s=pattern.shape)
    assert np.interp(0.0, x, gradient[0]) == pytest.approx(expected_n_per_m, rel=5e-4)


def test_the_uncertainty_of_the_measurement_plane_reaches_the_offset_and_the_map():
    # the reference was imaged 4 nm further from the film than assumed (24 against 20 nm): the TTF is then
    # TTF exp(-k 4 nm) and the map errs by exp(k 4 nm). Stated as a 4 nm standard uncertainty of the plane, it
    # widens the offset's uncertainty to cover the shifted delta (34 nm from the assumed plane) and the map's to
    # cover its error (measured: 2-sigma coverage 1.00 and rms error / rms uncertainty 1.02; without it 0.32
    # and 4.3)
    ref = make_image(n=192, oversample=2, seed=2, crop=(384, 64, 96), **{**REF, "height_m": 24e-9}, **TIP)
    sam = make_image(n=192, oversample=2, pixel_m=10e-9, period_m=350e-9, ms=9e5, thickness_m=20e-9,
                     height_m=30e-9, noise_n_per_m=1e-4, seed=102, crop=(384, 40, 90), **TIP)
    cal = calibrate_tip(ref.gradient_n_per_m, pixel_m=REF["pixel_m"], ms_a_per_m=REF["ms"],
                        thickness_m=REF["thickness_m"], plane_m=20e-9, ms_std_a_per_m=0.0, thickness_std_m=0.0,
                        plane_std_m=4e-9)
    pp = cal.point_probe
    assert pp.offset_std_m >= 4e-9 and abs(pp.offset_m - (TIP["offset_m"] + 4e-9)) < 2 * pp.offset_std_m
    fm = _map(cal, sam, 30e-9, plane_std_m=4e-9)
    truth = sam.hz_in_band(fm.band_k_per_m, band_taper)
    err = _interior(fm.hz_a_per_m - truth, fm.margin_px)
    std = _interior(fm.hz_std_a_per_m, fm.margin_px)
    assert np.mean(np.abs(err) < 2 * std) > 0.9
    assert 0.7 < np.sqrt(np.mean(err**2) / np.mean(std**2)) < 1.5
