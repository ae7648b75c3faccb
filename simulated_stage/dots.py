"""Single-domain dots that switch as a whole, and the tip coating's own reversal.

Each dot of the ``dots`` pattern is one element magnetised along +z or -z that reverses as a whole when the
field along its reversal direction exceeds its own switching field (each element a Stoner-Wohlfarth-like
particle with its field along the easy axis, textbook; from memory). The switching fields are drawn once from
a normal distribution (mean and spread set in the scenario) and stay fixed; a reversed dot stays reversed until
the field drives it back. The field that counts is the applied field plus the tip's field at the dot's centre
on its top surface (the strongest point under a tip above it: a nucleation picture; a model choice, no source).
The tip coating reverses when the applied field opposes its moment by more than the tip's coercive field.
"""

from __future__ import annotations

import numpy as np

from simulated_stage.magnetism import pixel_centres_m
from simulated_stage.tip import point_probe_field

_MAX_FLIPS_PER_PASS = 8  # a dot can flip back and forth under a tip that passes it only a few times


def tip_direction(direction: float, field_a_per_m: float, coercive_a_per_m: float) -> float:
    """The tip coating's magnetisation direction (+1 or -1 along z) after a uniform field along z."""
    if direction > 0 and field_a_per_m < -coercive_a_per_m:
        return -1.0
    if direction < 0 and field_a_per_m > coercive_a_per_m:
        return 1.0
    return direction


class DotElements:
    """The dots of a ``dots`` magnetisation map ``mz`` (modified in place when a dot switches).

    Parameters
    ----------
    mz : (n, n) array of M_z [A/m] as made by ``magnetism.pattern_maps`` (dots on a square lattice of period p,
        anti-aliased edges); kept by reference.
    pixel_m, period_m : map pixel and lattice period [m].
    switching_mean_a_per_m, switching_spread_a_per_m : normal distribution of the switching fields [A/m];
        draws below 1 % of the mean are raised to it (a dot without any coercivity is not a dot).
    rng : generator for the switching fields.
    """

    def __init__(self, mz: np.ndarray, *, pixel_m: float, period_m: float, switching_mean_a_per_m: float,
                 switching_spread_a_per_m: float, rng: np.random.Generator) -> None:
        self.mz = mz
        n = mz.shape[0]
        x = pixel_centres_m(n, pixel_m)
        cell = np.floor((x + period_m / 2.0) / period_m).astype(int)  # lattice index of each row/column
        flat = np.flatnonzero(mz.ravel() != 0.0)
        rows, cols = np.divmod(flat, n)
        key = (cell[rows] - cell.min()) * (cell.max() - cell.min() + 1) + (cell[cols] - cell.min())
        order = np.argsort(key, kind="stable")
        self.pixels = flat[order]  # pixel indices grouped dot by dot
        keys, starts = np.unique(key[order], return_index=True)
        self.starts = np.append(starts, self.pixels.size)  # dot i owns pixels[starts[i]:starts[i + 1]]
        first = self.pixels[starts]
        r0, c0 = np.divmod(first, n)
        self.x_m = cell[c0] * period_m  # centre of each dot's lattice cell (its own centre)
        self.y_m = cell[r0] * period_m
        self.count = keys.size
        draws = rng.normal(switching_mean_a_per_m, switching_spread_a_per_m, self.count)
        self.switching_a_per_m = np.maximum(draws, 0.01 * switching_mean_a_per_m)

    def polarity(self) -> np.ndarray:
        """+1 or -1 per dot: the sign of its magnetisation."""
        return np.sign(self.mz.ravel()[self.pixels[self.starts[:-1]]])

    def _flip(self, dots: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if dots.size == 0:
            return np.zeros(0, np.intp), np.zeros(0)
        pix = np.concatenate([self.pixels[self.starts[i]:self.starts[i + 1]] for i in dots])
        flat = self.mz.reshape(-1)
        old = flat[pix].copy()
        flat[pix] = -old
        return pix, old

    def apply_field(self, field_a_per_m: float) -> tuple[np.ndarray, np.ndarray]:
        """Reverse every dot the uniform field ``field_a_per_m`` (along +z) drives past its switching field.

        Returns the flat indices of the reversed pixels and their values before the reversal.
        """
        p = self.polarity()
        flip = (-p * field_a_per_m) > self.switching_a_per_m
        return self._flip(np.flatnonzero(flip))

    def expose(self, x_m: np.ndarray, y_m: np.ndarray, height_m: np.ndarray, *, field_a_per_m: float,
               moment_a_m2: float, monopole_a_m: float) -> tuple[np.ndarray, np.ndarray]:
        """Dots reversed by the applied field plus the field of a tip passing the positions (x, y) in order.

        ``height_m`` is the point probe's height above the dots' top surface at each position. Returns the
        reversed pixels and their previous values (a dot reversed twice in the pass is left out).
        """
        x, y, h = (np.ravel(a) for a in np.broadcast_arrays(x_m, y_m, height_m))
        if x.size == 0 or self.count == 0:
            return self._flip(np.zeros(0, np.intp))
        h = np.maximum(h, 1e-10)
        z_min = float(h.min())
        strongest = 2.0 * abs(moment_a_m2) / (4 * np.pi * z_min**3) + abs(monopole_a_m) / (4 * np.pi * z_min**2)
        p = self.polarity()
        margin = self.switching_a_per_m + p * field_a_per_m  # what the tip must add against the polarity
        candidates = np.flatnonzero(margin < strongest)
        if candidates.size == 0:
            return self._flip(candidates)
        _, _, hz = point_probe_field(self.x_m[candidates][None, :] - x[:, None],
                                     self.y_m[candidates][None, :] - y[:, None],
                                     np.broadcast_to(h[:, None], (x.size, candidates.size)),
                                     moment_a_m2=moment_a_m2, monopole_a_m=monopole_a_m)
        total = hz + field_a_per_m  # (positions, candidates)
        net = []
        for j, dot in enumerate(candidates):
            state, start, flips = p[dot], 0, 0
            hsw = self.switching_a_per_m[dot]
            while flips < _MAX_FLIPS_PER_PASS:
                beyond = np.flatnonzero(-state * total[start:, j] > hsw)
                if beyond.size == 0:
                    break
                start += int(beyond[0]) + 1
                state, flips = -state, flips + 1
            if flips % 2:
                net.append(dot)
        return self._flip(np.asarray(net, dtype=np.intp))
