"""Written tracks with a known layout: random data, write jitter, erase bands and old data between the tracks.

Tracks run along x, one every ``pitch``, each ``width`` wide. Along a track the bit cells are ``bit`` long from a
random phase; random data put a transition wherever two neighbouring cells differ, and each transition lands
off its cell boundary by a Gaussian jitter. A transition has the arctan profile of Williams & Comstock 1971
(AIP Conf. Proc. 5, 738; from memory), M = (2 Ms / pi) arctan((x - x0) / a), for in-plane films, and the domain
wall profile M = Ms tanh((x - x0) / a) for perpendicular ones; both are evaluated at the map's pixel centres, so
the sub-pixel positions of the jittered transitions survive. On either side of a track an erase band of
``erase`` is DC-erased (+Ms); the rest of the space between tracks holds old data (random bits of ``old_bit``)
or, without old data, is DC-erased too. Invented layouts for practice; no product's format.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["TrackLayout", "written_tracks"]


@dataclass(frozen=True)
class TrackLayout:
    """Layout in metres; ``old_bit_m`` 0 means DC-erased between the tracks."""

    bit_m: float
    pitch_m: float
    width_m: float
    jitter_m: float = 0.0
    erase_m: float = 0.0
    old_bit_m: float = 0.0


def _profile(x: np.ndarray, positions: np.ndarray, steps: np.ndarray, start: float, a: float,
             shape: str) -> np.ndarray:
    """Start level plus a smoothed step of ``steps[j]`` at each position, evaluated at ``x`` (in units of Ms)."""
    out = np.full(x.shape, float(start))
    if positions.size == 0:
        return out
    u = (x[:, None] - positions[None, :]) / max(a, 1e-12)
    unit = 0.5 + np.arctan(u) / np.pi if shape == "arctan" else 0.5 * (1.0 + np.tanh(u))
    return out + unit @ steps


def _data(rng: np.random.Generator, x: np.ndarray, bit: float, jitter: float) -> tuple[np.ndarray, np.ndarray,
                                                                                          float]:
    """Transitions of random data over the span of ``x``: positions, step sizes (+-2) and the start level."""
    lo, hi = x[0] - 4 * bit, x[-1] + 4 * bit
    phase = rng.uniform(0.0, bit)
    first = int(np.floor((lo - phase) / bit))
    cells = int(np.ceil((hi - lo) / bit)) + 2
    bits = rng.choice(np.array([-1.0, 1.0]), size=cells)
    change = np.flatnonzero(bits[1:] != bits[:-1]) + 1
    positions = phase + (first + change) * bit + rng.normal(scale=jitter, size=change.size) if jitter > 0 else \
        phase + (first + change) * bit
    return positions, bits[change] - bits[change - 1], float(bits[0])


def written_tracks(n: int, pixel_m: float, layout: TrackLayout, *, transition_m: float, shape: str,
                   rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """(M / Ms map, track mask) on an n x n map centred on 0 (rows = y); see the module docstring."""
    x = (np.arange(n) + 0.5) * pixel_m - 0.5 * n * pixel_m
    m = np.ones((n, n))
    mask = np.zeros((n, n))
    # track centres at y = (j + 1/2) pitch, so one sits on either side of the map's centre
    centres = (np.arange(int(np.floor(x[0] / layout.pitch_m)) - 1, int(np.ceil(x[-1] / layout.pitch_m)) + 1)
               + 0.5) * layout.pitch_m
    for c in centres:
        inside = np.abs(x - c) < 0.5 * layout.width_m
        if inside.any():
            pos, steps, start = _data(rng, x, layout.bit_m, layout.jitter_m)
            m[inside] = _profile(x, pos, steps, start, transition_m, shape)[None, :]
            mask[inside] = 1.0
        if layout.old_bit_m > 0:
            lo = c + 0.5 * layout.width_m + layout.erase_m
            hi = c + layout.pitch_m - 0.5 * layout.width_m - layout.erase_m
            between = (x >= lo) & (x < hi)
            if between.any():
                pos, steps, start = _data(rng, x, layout.old_bit_m, 0.0)
                m[between] = _profile(x, pos, steps, start, transition_m, shape)[None, :]
    return np.clip(m, -1.0, 1.0), mask
