"""The magnetic point-probe interaction of the virtual sample, from cached maps of the film's stray field.

Caches:
* the FFT spectrum of the film's stray field (one forward transform per magnetisation state; dropped when
  pixels switch and rebuilt only when a new height node is needed);
* per (amplitude, probe-height node) a stack of five float32 cubic-spline coefficient maps of the magnetic
  point-probe interaction: <F'>, d<F'>/dz, d2<F'>/dz2, <F>, d<F>/dz. Each point uses a node within 5 % of
  its probe height and a second-order expansion in the offset (first order for the force). New nodes go
  at the middle uncovered point, on a 0.5 % log grid so that later lines reuse them. Up to 5 % of
  a call's points (tracking-noise outliers) may borrow a node up to 15 % away. Calls with at most 8
  uncovered points (single reads during an approach) are summed directly from the spectrum (30-100 ms
  per point, nothing cached) until the same 5 % height bin has been read 20 times (a parked tip).
  Nodes live in a cache with a byte budget that drops the least used node; after switching they are
  updated in place from the field of the switched pixels.
"""

from __future__ import annotations

import math

import numpy as np

from simulated_stage import magnetism
from simulated_stage.tip import TipSpec

_NODE_TOLERANCE = 0.05     # |ln(z / z_node)| covered by one node (second-order expansion)
_NODE_GRID = 0.005         # log-spacing of the grid on which new nodes are placed
_STRAGGLER_FRACTION = 0.05  # up to this fraction of a call's points may use ...
_WIDE_TOLERANCE = 0.15      # ... a node up to 15 % away (error up to ~1.5e-2 instead of ~3e-4, see the tests)
_DIRECT_POINTS = 8         # calls with at most this many points off every cached height are summed directly
_DIRECT_REPEATS = 20       # ... until the same height has been read that often (a parked tip)
_HALO_PX = 3               # pixels kept around the film in the spline maps


class MagneticProbeMaps:
    """Magnetic force and gradient on the tip's point probe over a film of magnetisation ``mx``, ``mz`` [A/m]
    (square maps, rows = y; the arrays are shared with the sample, which switches them in place and then calls
    :meth:`switched`). ``nodes`` maps (amplitude, probe height) to its five spline maps."""

    def __init__(self, mx: np.ndarray, mz: np.ndarray, *, pixel_m: float, thickness_m: float, tip: TipSpec,
                 cache_bytes: int = 1 << 30) -> None:
        self._mx, self._mz = mx, mz
        self.pixel_m = pixel_m
        self.n = mx.shape[0]
        self._thickness_m = thickness_m
        self.tip = tip
        self._cache_bytes = cache_bytes
        self._stray: magnetism.StrayField | None = None
        self.nodes: dict[tuple[float, float], np.ndarray] = {}  # insertion order = age
        self._direct_reads: dict[tuple[float, int], int] = {}
        self._node_uses: dict[tuple[float, float], int] = {}

    def clear(self) -> None:
        """Forget every node and the spectrum (the next call computes them again)."""
        self.nodes.clear()
        self._stray = None

    def _stray_field(self) -> magnetism.StrayField:
        if self._stray is None:
            self._stray = magnetism.StrayField(self._mx, self._mz, pixel_m=self.pixel_m,
                                               thickness_m=self._thickness_m, halo_px=_HALO_PX)
        return self._stray

    def _node(self, amp: float, z_node: float) -> np.ndarray:
        key = (amp, z_node)
        self._node_uses[key] = self._node_uses.get(key, 0) + 1
        if key in self.nodes:
            return self.nodes[key]
        maps = self._node_maps(self._stray_field(), amp, z_node)
        self.nodes[key] = maps
        # Over budget, drop the least used node (oldest first among equals). Plain LRU would thrash on the
        # cyclic order of a lift series (every height once per line) as soon as the heights exceed the budget.
        # Default budget 1 GiB: 13 nodes of a 2000^2 film (80 MB each).
        while len(self.nodes) > 1 and maps.nbytes * len(self.nodes) > self._cache_bytes:
            victim = min((k for k in self.nodes if k != key), key=lambda k: self._node_uses.get(k, 0))
            del self.nodes[victim]
            # age the counts so that a new set of heights can take over from an old one
            self._node_uses = {k: n // 2 for k, n in self._node_uses.items() if n > 1}
        return maps

    def _read_often(self, amp: float, lz: np.ndarray) -> bool:
        """Count direct reads per 5 % height bin; a bin read more than _DIRECT_REPEATS times gets a map."""
        bins = np.round(lz / _NODE_TOLERANCE).astype(int)
        often = False
        for b in np.unique(bins):
            key = (amp, int(b))
            self._direct_reads[key] = self._direct_reads.get(key, 0) + int(np.count_nonzero(bins == b))
            often |= self._direct_reads[key] > _DIRECT_REPEATS
        return often

    def _node_maps(self, stray: magnetism.StrayField, amp: float, z_node: float) -> np.ndarray:
        """Spline coefficients of <F'>, d<F'>/dz, d2<F'>/dz2, <F>, d<F>/dz at one probe height, stacked
        as one (5, rows, columns) float32 array."""
        force, grad = stray.probe_spectra(z_node, amp, moment_a_m2=self.tip.moment_a_m2,
                                          monopole_a_m=self.tip.monopole_a_m)
        k = stray.k
        return np.stack([stray.to_map(s, spline=True, dtype=np.float32)
                         for s in (grad, -k * grad, k * k * grad, force, -k * force)])

    def switched(self, pixels: np.ndarray, old_values: np.ndarray, in_plane: bool) -> None:
        """Add the field of the switched pixels (Delta M = -2 M_old) to every cached node map.

        Computed on local windows around the switched pixels, with a margin of at least ten times the node's
        probe height (nodes share windows whose margins are powers of two): the field of a switched patch
        falls off at least as (z/r)^3 laterally, so what lies beyond the margin is below 1e-3 of the change.
        Much cheaper than rebuilding every node; equal to a rebuild to 2e-7 of the change in the tests.
        """
        self._stray = None  # the full spectrum is rebuilt only if a new node is needed
        if not self.nodes:
            return
        rows, cols = np.divmod(pixels, self.n)
        buckets: dict[int, list[tuple[float, float]]] = {}
        for amp, z_node in self.nodes:
            need = max(16.0, 10.0 * z_node / self.pixel_m)
            buckets.setdefault(16 * 2 ** math.ceil(math.log2(need / 16.0)), []).append((amp, z_node))
        for margin, keys in buckets.items():
            r0, r1 = max(rows.min() - margin, 0), min(rows.max() + margin + 1, self.n)
            c0, c1 = max(cols.min() - margin, 0), min(cols.max() + margin + 1, self.n)
            delta = np.zeros((r1 - r0, c1 - c0))
            delta[rows - r0, cols - c0] = -2.0 * old_values
            zeros = np.zeros_like(delta)
            local = magnetism.StrayField(delta if in_plane else zeros, zeros if in_plane else delta,
                                         pixel_m=self.pixel_m, thickness_m=self._thickness_m,
                                         pad_m=margin * self.pixel_m, halo_px=_HALO_PX)
            h = local.halo_px
            for key in keys:
                self.nodes[key][:, r0:r1 + 2 * h, c0:c1 + 2 * h] += self._node_maps(local, *key)

    def true_hz_a_per_m(self, x_m: np.ndarray, y_m: np.ndarray, height_m: float) -> np.ndarray:
        """The film's stray field H_z [A/m] at points (x, y) [m] in the sample frame, ``height_m`` above the film's
        top surface (z away from the sample).

        For tests of field maps only: no instrument can report this, so it is not part of the controller interface
        (tests reach it as ``controller.stage.sample``). Exact per Fourier component (the spectrum the interaction
        uses), interpolated between the film's pixel centres by cubic splines.
        """
        if not (math.isfinite(height_m) and height_m >= 0.0):
            raise ValueError(f"height_m = {height_m!r} must be finite and >= 0")
        x, y = np.broadcast_arrays(np.asarray(x_m, float), np.asarray(y_m, float))
        stray = self._stray_field()
        coefficients = stray.to_map(stray.base * np.exp(-stray.k * height_m), spline=True)
        return magnetism.sample_map(coefficients, x, y, pixel_m=self.pixel_m, n=self.n, halo_px=_HALO_PX, order=3)

    def at(self, x: np.ndarray, y: np.ndarray, zp: np.ndarray, amp: float) -> tuple[np.ndarray, np.ndarray]:
        """Oscillation-averaged magnetic force and gradient at probe heights ``zp`` above the film's top [N, N/m]."""
        shape = zp.shape
        x, y, zp = x.ravel(), y.ravel(), zp.ravel()
        lz = np.log(zp)
        node_of = np.full(zp.shape, -1)
        heights: list[float] = [z for (a, z) in self.nodes if a == amp]
        for _ in range(64):
            if heights:
                dist = np.abs(lz[:, None] - np.log(np.asarray(heights))[None, :])
                nearest = np.argmin(dist, axis=1)
                gap = dist[np.arange(len(lz)), nearest]
                node_of = np.where(gap <= _NODE_TOLERANCE, nearest, -1)
                uncovered = node_of < 0
                # Rare outliers (tracking noise) borrow the nearest node from further away rather than
                # each creating a node of their own (a memory cost of five maps).
                if uncovered.mean() <= _STRAGGLER_FRACTION:
                    wide = uncovered & (gap <= _WIDE_TOLERANCE)
                    node_of = np.where(wide, nearest, node_of)
            uncovered = node_of < 0
            if not uncovered.any():
                break
            if uncovered.sum() <= _DIRECT_POINTS and not self._read_often(amp, lz[uncovered]):
                break  # a handful of points (single reads on an approach): no map for them, see below
            # the middle uncovered point itself (np.median would average two points and may fall between
            # two lift heights, covering neither)
            pending = lz[uncovered]
            middle = float(np.partition(pending, pending.size // 2)[pending.size // 2])
            z_new = math.exp(round(middle / _NODE_GRID) * _NODE_GRID)
            heights.append(max(z_new, amp * 1.02 + 0.5e-9))
        f = np.empty(zp.shape)
        g = np.empty(zp.shape)
        direct = node_of < 0
        if direct.any():
            f[direct], g[direct] = self._stray_field().probe_at_points(
                x[direct], y[direct], zp[direct], amp, moment_a_m2=self.tip.moment_a_m2,
                monopole_a_m=self.tip.monopole_a_m)
        for index in np.unique(node_of[~direct]):
            sel = node_of == index
            z0 = heights[index]
            d = zp[sel] - z0
            coords = magnetism.map_coordinates_px(x[sel], y[sel], pixel_m=self.pixel_m, n=self.n,
                                                  halo_px=_HALO_PX)
            val = magnetism.cubic_bspline_at(self._node(amp, z0), coords)
            g[sel] = val[0] + d * (val[1] + 0.5 * d * val[2])
            f[sel] = val[3] + d * val[4]
        return f.reshape(shape), g.reshape(shape)
