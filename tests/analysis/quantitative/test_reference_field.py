"""The reference film's field against magpylib and the closed-form stripe series; sub-pixel wall placement."""

from __future__ import annotations

import math

import magpylib as magpy
import numpy as np
import pytest

from assistant.analysis.quantitative import film_field, subpixel_sign


def test_domain_pattern_field_matches_magpylib():
    # A random 24 x 24 pattern of 10 nm cells, +-Ms through t = 20 nm, observed 30 nm above its top: each cell a
    # uniformly magnetised cuboid in magpylib (Ortner & Coliado Bandeira 2020, SoftwareX 11, 100466), summed.
    rng = np.random.default_rng(1)
    n, p, t, z, ms = 24, 10e-9, 20e-9, 30e-9, 8e5
    s = np.sign(rng.standard_normal((n, n)))
    x = (np.arange(n) + 0.5) * p - n * p / 2
    xx, yy = np.meshgrid(x, x)  # rows = y
    obs = np.stack([xx.ravel(), yy.ravel(), np.full(xx.size, z)], axis=1)
    centres = np.stack([xx.ravel(), yy.ravel(), np.full(xx.size, -t / 2)], axis=1)
    # every observer with every cell, through magpylib's functional interface (one source per row)
    o = np.repeat(obs, centres.shape[0], axis=0)
    c = np.tile(centres, (obs.shape[0], 1))
    pol = np.zeros_like(c)
    pol[:, 2] = magpy.mu_0 * ms * np.tile(s.ravel(), obs.shape[0])
    h = magpy.func.cuboid_field(field="H", observers=o, dimensions=np.broadcast_to([p, p, t], c.shape),
                                polarizations=pol, positions=c)
    expected = h[:, 2].reshape(obs.shape[0], -1).sum(axis=1).reshape(n, n)
    got = film_field(s, ms_a_per_m=ms, thickness_m=t, height_m=z, pixel_m=p, pixel_model="cell", edge="zero",
                     pad_px=128)
    # pixelation aliasing of the FFT form is of order exp(-pi z / p); measured 2.2e-4 of the peak here
    assert np.max(np.abs(got - expected)) < 5e-4 * np.max(np.abs(expected))


def test_periodic_stripes_match_the_closed_form_series():
    # Square-wave stripes, Ms = 8e5 A/m, t = 50 nm, period 400 nm, z = 50 nm: Hz at a domain centre
    # = sum_n odd (2 Ms/(n pi)) (-1)^((n-1)/2) exp(-k_n z)(1 - exp(-k_n t)) = 1.134816e5 A/m (the series of the
    # charge formulation, Hug et al. 1998, J. Appl. Phys. 83, 5609; value computed and cross-checked with magpylib).
    p, period = 4e-9, 400e-9
    n = round(period / p)
    x = (np.arange(n) + 0.5) * p - period / 2
    # exact cell averages of sign(cos(2 pi x / period)), walls inside pixels
    def tri(u):
        v = np.mod(u + period / 4, period)
        return np.where(v < period / 2, v, period - v) - period / 4
    row = (tri(x + p / 2) - tri(x - p / 2)) / p
    pattern = np.tile(row, (8, 1))
    hz = film_field(pattern, ms_a_per_m=8e5, thickness_m=50e-9, height_m=50e-9, pixel_m=p)
    centre = np.interp(0.0, x, hz[0])
    assert centre == pytest.approx(1.134816e5, rel=2e-4)


@pytest.mark.parametrize("angle_deg", [0.0, 20.0, 45.0, 70.0])
@pytest.mark.parametrize("offset", [0.13, -0.31])
def test_subpixel_sign_gives_the_cell_average_of_a_straight_wall(angle_deg, offset):
    # A straight wall at an angle, crossing pixels at sub-pixel positions: the cell averages of sign(d), d the signed
    # distance to the wall, by supersampling each pixel 64 x 64 (the exact area fraction to about 1/64).
    n, p = 12, 1.0
    a = math.radians(angle_deg)
    nx, ny = math.cos(a), math.sin(a)
    yc, xc = np.mgrid[0:n, 0:n] + 0.5
    u = (xc - n / 2 - offset) * nx + (yc - n / 2) * ny          # a linear map: its zero line is the wall
    got = subpixel_sign(u, p)
    f = (np.arange(64) + 0.5) / 64 - 0.5
    sy, sx = np.meshgrid(f, f, indexing="ij")
    d = ((xc[..., None, None] + sx - n / 2 - offset) * nx + (yc[..., None, None] + sy - n / 2) * ny)
    exact = np.sign(d).mean(axis=(-1, -2))
    assert np.max(np.abs(got - exact)) < 0.04
    assert np.all(np.abs(got[np.abs(u) > 1.0]) == 1.0)
