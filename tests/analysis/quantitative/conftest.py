"""Synthetic reference and sample images shared by the quantitative-MFM tests (module-scoped: built once)."""

from __future__ import annotations

import pytest

from tests.analysis.quantitative.synthetic import make_image

# An invented point-probe tip (the tests' outside reference: the analytic TTF of Hartmann 1999 / Lohau et al. 1999)
TIP = dict(moment_a_m2=1e-16, monopole_a_m=-3e-9, offset_m=30e-9)
REF = dict(pixel_m=10e-9, period_m=200e-9, ms=6e5, thickness_m=12e-9, height_m=20e-9, noise_n_per_m=1e-4)


@pytest.fixture(scope="session")
def periodic_reference():
    """128 x 128, one period of a maze film; walls inside pixels (4x finer pattern)."""
    return make_image(n=128, oversample=4, seed=1, **REF, **TIP)


@pytest.fixture(scope="session")
def crop_reference():
    """192 x 192 window onto a 384 x 384 film: not periodic."""
    return make_image(n=192, oversample=2, seed=2, crop=(384, 64, 96), **REF, **TIP)


@pytest.fixture(scope="session")
def crop_sample():
    """Sample under test: other domain size (350 nm), Ms (900 kA/m), thickness (20 nm), plane (30 nm)."""
    return make_image(n=192, oversample=2, pixel_m=10e-9, period_m=350e-9, ms=9e5, thickness_m=20e-9,
                      height_m=30e-9, noise_n_per_m=1e-4, seed=102, crop=(384, 40, 90), **TIP)
