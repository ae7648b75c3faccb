"""The virtual sample: topography, magnetic film, contact potential, and the tip-sample interaction.

Geometry: x along the fast axis, y along the slow axis, metres, in the sample frame; the map is centred on
(0, 0). ``gap_m`` is the apex-to-local-surface distance at the centre of the oscillation. The magnetic film's
top surface is a flat plane at the height of the tallest features (``feature_height_nm`` for dots/tracks,
else 0), so the magnetic height of the probe is gap + topography - plane + effective distance.
Sign convention: F > 0 repulsive, F' = dF/dz (attractive and strengthening on approach: F < 0, F' > 0).

Caches:
* the FFT spectrum of the film's stray field (one forward transform per magnetisation state; dropped when
  ``expose`` switches pixels and rebuilt only when a new height node is needed);
* per (amplitude, probe-height node) a stack of five float32 cubic-spline coefficient maps of the magnetic
  point-probe interaction: <F'>, d<F'>/dz, d2<F'>/dz2, <F>, d<F>/dz. Each point uses a node within 5 % of
  its probe height and a second-order expansion in the offset (first order for the force). New nodes go
  at the middle uncovered point, on a 0.5 % log grid so that later lines reuse them. Up to 5 % of
  a call's points (tracking-noise outliers) may borrow a node up to 15 % away. Calls with at most 8
  uncovered points (single reads during an approach) are summed directly from the spectrum (30-100 ms
  per point, nothing cached) until the same 5 % height bin has been read 20 times (a parked tip).
  Nodes live in a cache with a byte budget that drops the least used node; after switching they are
  updated in place from the field of the switched pixels;
* per amplitude (rounded to 4 significant digits), spline tables of the oscillation-averaged
  electrostatic (per V^2), short-range and induced (susceptibility) forces and gradients versus gap.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from simulated_stage import magnetism
from simulated_stage.averaging import AveragedTable
from simulated_stage.contact import ShortRangeForce, reduced_modulus_pa
from simulated_stage.electrostatics import TipCapacitance
from simulated_stage.errors import ScenarioError
from simulated_stage.tip import TipSpec, check_range, field_reach_m, point_probe_field, spec_from_table

_NODE_TOLERANCE = 0.05     # |ln(z / z_node)| covered by one node (second-order expansion)
_NODE_GRID = 0.005         # log-spacing of the grid on which new nodes are placed
_STRAGGLER_FRACTION = 0.05  # up to this fraction of a call's points may use ...
_WIDE_TOLERANCE = 0.15      # ... a node up to 15 % away (error up to ~1.5e-2 instead of ~3e-4, see the tests)
_MAX_PIXELS = 8192
_DIRECT_POINTS = 8         # calls with at most this many points off every cached height are summed directly
_DIRECT_REPEATS = 20       # ... until the same height has been read that often (a parked tip)
_HALO_PX = 3               # pixels kept around the film in the spline maps


@dataclass(frozen=True)
class SampleSpec:
    """Sample description (scenario table ``[sample]``); see the module docstring for the geometry."""

    pattern: str = "oop_tracks"
    period_nm: float = 400.0
    transition_width_nm: float = 20.0
    saturation_magnetisation_ka_per_m: float = 800.0
    thickness_nm: float = 20.0
    coercive_field_ka_per_m: float = 200.0
    susceptibility: float = 0.0
    extent_um: float = 20.0
    pixel_nm: float = 10.0
    roughness_nm: float = 0.5
    feature_height_nm: float = 0.0
    cpd_v: float = 0.3
    cpd_variation_v: float = 0.0
    hamaker_j: float = 1e-19
    youngs_modulus_gpa: float = 150.0
    seed: int = 1
    # written-track layout of the two track patterns (0: the layout that follows from period_nm)
    bit_length_nm: float = 0.0
    track_pitch_nm: float = 0.0
    track_width_nm: float = 0.0
    jitter_nm: float = 0.0
    erase_band_nm: float = 0.0
    old_data_bit_nm: float = 0.0

    def __post_init__(self) -> None:
        s = "sample"
        if self.pattern not in magnetism.PATTERNS:
            raise ScenarioError(f"[sample] pattern = {self.pattern!r} must be one of "
                                f"{', '.join(magnetism.PATTERNS)}")
        check_range(s, "pixel_nm", self.pixel_nm, 0.5, 100.0)
        check_range(s, "period_nm", self.period_nm, 4.0 * self.pixel_nm, 1e5)
        check_range(s, "transition_width_nm", self.transition_width_nm, 0.0, 0.5 * self.period_nm)
        check_range(s, "saturation_magnetisation_ka_per_m", self.saturation_magnetisation_ka_per_m, 0.0, 3000.0)
        check_range(s, "thickness_nm", self.thickness_nm, 0.0, 1e4, low_open=True)
        check_range(s, "coercive_field_ka_per_m", self.coercive_field_ka_per_m, 0.0, 1e5, low_open=True)
        check_range(s, "susceptibility", self.susceptibility, 0.0, 1.0)
        check_range(s, "extent_um", self.extent_um, 16 * self.pixel_nm * 1e-3, _MAX_PIXELS * self.pixel_nm * 1e-3)
        check_range(s, "roughness_nm", self.roughness_nm, 0.0, 100.0)
        check_range(s, "feature_height_nm", self.feature_height_nm, 0.0, 1000.0)
        check_range(s, "cpd_v", self.cpd_v, -10.0, 10.0)
        check_range(s, "cpd_variation_v", self.cpd_variation_v, 0.0, 10.0)
        check_range(s, "hamaker_j", self.hamaker_j, 0.0, 1e-17)
        check_range(s, "youngs_modulus_gpa", self.youngs_modulus_gpa, 0.0, 2000.0, low_open=True)
        check_range(s, "seed", self.seed, 0, 2**63 - 1)
        self._check_tracks()

    def _check_tracks(self) -> None:
        s = "sample"
        extra = {k: getattr(self, k) for k in ("track_pitch_nm", "track_width_nm", "jitter_nm", "erase_band_nm",
                                               "old_data_bit_nm")}
        if self.bit_length_nm == 0.0:
            given = [k for k, v in extra.items() if v != 0.0]
            if given:
                raise ScenarioError(f"[sample] {given[0]} needs bit_length_nm (the written-track layout)")
            return
        if self.pattern not in ("oop_tracks", "inplane_bits"):
            raise ScenarioError(f"[sample] bit_length_nm applies to the patterns oop_tracks and inplane_bits, "
                                f"not {self.pattern!r}")
        check_range(s, "bit_length_nm", self.bit_length_nm, 2.0 * self.pixel_nm, 1e5)
        check_range(s, "track_pitch_nm", self.track_pitch_nm, 4.0 * self.pixel_nm, self.extent_um * 1e3)
        check_range(s, "track_width_nm", self.track_width_nm, 2.0 * self.pixel_nm, self.track_pitch_nm)
        check_range(s, "jitter_nm", self.jitter_nm, 0.0, 0.25 * self.bit_length_nm)
        check_range(s, "erase_band_nm", self.erase_band_nm, 0.0, 0.5 * (self.track_pitch_nm - self.track_width_nm))
        check_range(s, "old_data_bit_nm", self.old_data_bit_nm, 0.0, 1e5)

    def track_layout(self):
        """The written-track layout in metres, or None for the layout that follows from ``period_nm``."""
        if self.bit_length_nm == 0.0:
            return None
        from simulated_stage.recording import TrackLayout

        return TrackLayout(self.bit_length_nm * 1e-9, self.track_pitch_nm * 1e-9, self.track_width_nm * 1e-9,
                           self.jitter_nm * 1e-9, self.erase_band_nm * 1e-9, self.old_data_bit_nm * 1e-9)

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> "SampleSpec":
        """Build from a scenario ``[sample]`` table; unknown keys raise ScenarioError naming the key."""
        return spec_from_table(cls, table, "sample")


@dataclass(frozen=True)
class Interaction:
    """Oscillation-averaged interaction at each point (arrays of the broadcast input shape)."""

    force_gradient_n_per_m: np.ndarray      # Giessibl-weighted <F'>, sum of the three parts below
    force_n: np.ndarray                     # time-averaged force
    magnetic_gradient_n_per_m: np.ndarray   # stray field on the point probe plus induced (soft-film) response
    electrostatic_gradient_n_per_m: np.ndarray
    vdw_gradient_n_per_m: np.ndarray        # short range: van der Waals, plus DMT repulsion if the cycle touches


def build_sample(sample: SampleSpec, tip: TipSpec, *, cache_bytes: int = 1 << 30) -> "Sample":
    """Build the virtual sample for this tip (the magnetic maps are computed lazily, on first use)."""
    return Sample(sample, tip, cache_bytes=cache_bytes)


class Sample:
    """Virtual sample; see the module docstring for geometry, caches and accuracy."""

    def __init__(self, spec: SampleSpec, tip: TipSpec, *, cache_bytes: int = 1 << 30) -> None:
        self.spec, self.tip = spec, tip
        self.pixel_m = spec.pixel_nm * 1e-9
        self.n = int(round(spec.extent_um * 1e-6 / self.pixel_m))
        pattern_seed, rough_seed = np.random.SeedSequence(spec.seed).spawn(2)
        mx, mz, features = magnetism.pattern_maps(
            spec.pattern, n=self.n, pixel_m=self.pixel_m, period_m=spec.period_nm * 1e-9,
            transition_m=spec.transition_width_nm * 1e-9,
            ms_a_per_m=spec.saturation_magnetisation_ka_per_m * 1e3, rng=np.random.default_rng(pattern_seed),
            tracks=spec.track_layout())
        self._mx, self._mz = mx, mz
        self._in_plane = bool(np.any(mx))  # in-plane films switch along x, the others along z
        rough = magnetism.roughness_map(self.n, self.pixel_m, spec.roughness_nm * 1e-9,
                                        np.random.default_rng(rough_seed))
        self._topography = rough + spec.feature_height_nm * 1e-9 * features
        self._plane_m = spec.feature_height_nm * 1e-9 if np.any(features) else 0.0
        self.true_cpd_v = spec.cpd_v
        self._patch_sigma_m = min(1e-6, spec.extent_um * 1e-6 / 8.0)
        self._version = 0
        self._stray: magnetism.StrayField | None = None
        self._nodes: dict[tuple[float, float], np.ndarray] = {}  # insertion order = age
        self._cache_bytes = cache_bytes
        self._direct_reads: dict[tuple[float, int], int] = {}
        self._node_uses: dict[tuple[float, float], int] = {}
        self._tables: dict[float, tuple[AveragedTable, AveragedTable, AveragedTable | None]] = {}
        self._capacitance = TipCapacitance(radius_m=tip.radius_m, half_angle_rad=tip.cone_half_angle_rad,
                                           cone_height_m=tip.cone_height_m)
        self._short_range = ShortRangeForce(
            hamaker_j=spec.hamaker_j, radius_m=tip.radius_m,
            reduced_modulus_pa=reduced_modulus_pa(tip.youngs_modulus_pa, spec.youngs_modulus_gpa * 1e9))

    # ----------------------------------------------------------------------------------------- surfaces
    @property
    def magnetisation_version(self) -> int:
        return self._version

    def magnetisation_maps(self) -> tuple[np.ndarray, np.ndarray]:
        """Copies of (M_x, M_z) [A/m] (rows = y), for tests and diagnostics."""
        return self._mx.copy(), self._mz.copy()

    def topography_m(self, x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
        """Surface height [m] at points (bilinear interpolation of the topography map)."""
        x, y = np.broadcast_arrays(np.asarray(x_m, float), np.asarray(y_m, float))
        coords = magnetism.map_coordinates_px(x, y, pixel_m=self.pixel_m, n=self.n, halo_px=0)
        return magnetism.bilinear_at(self._topography, coords).reshape(x.shape)

    def cpd_v(self, x_m: np.ndarray, y_m: np.ndarray) -> np.ndarray:
        """Local contact potential difference [V]: mean plus a Gaussian charged patch at the centre."""
        r2 = np.asarray(x_m, float) ** 2 + np.asarray(y_m, float) ** 2
        return self.spec.cpd_v + self.spec.cpd_variation_v * np.exp(-0.5 * r2 / self._patch_sigma_m**2)

    def probe_height_m(self, x_m: np.ndarray, y_m: np.ndarray, gap_m: np.ndarray) -> np.ndarray:
        """Height of the magnetic point probe above the film's top surface [m]."""
        return gap_m + self.topography_m(x_m, y_m) - self._plane_m + self.tip.effective_distance_m

    # -------------------------------------------------------------------------------------- interaction
    def interaction(self, x_m: np.ndarray, y_m: np.ndarray, gap_m: np.ndarray, *, bias_v: float,
                    amplitude_m: float) -> Interaction:
        """Oscillation-averaged interaction at each point (Giessibl 2001 weights for the gradient)."""
        x, y, gap = np.broadcast_arrays(np.asarray(x_m, float), np.asarray(y_m, float),
                                        np.asarray(gap_m, float))
        amp = _amplitude_key(amplitude_m)
        es_table, sr_table, induced_table = self._tables_for(amp)
        f_es, g_es = es_table(gap)
        dv2 = (bias_v - self.cpd_v(x, y)) ** 2
        f_es, g_es = f_es * dv2, g_es * dv2
        f_sr, g_sr = sr_table(gap)
        zp = np.maximum(self.probe_height_m(x, y, gap), amp + 1e-9)
        f_mag, g_mag = self._magnetic(x, y, zp, amp)
        if induced_table is not None:
            f_ind, g_ind = induced_table(zp)
            f_mag, g_mag = f_mag + f_ind, g_mag + g_ind
        return Interaction(force_gradient_n_per_m=g_mag + g_es + g_sr, force_n=f_mag + f_es + f_sr,
                           magnetic_gradient_n_per_m=g_mag, electrostatic_gradient_n_per_m=g_es,
                           vdw_gradient_n_per_m=g_sr)

    def contact_force_n(self, x_m: float, y_m: float, gap_m: np.ndarray, *, bias_v: float = 0.0) -> np.ndarray:
        """Static force [N] at apex gaps ``gap_m`` (negative = indentation): vdW/DMT plus electrostatics.

        The magnetic force (~1e-11 N) is left out of force curves.
        """
        gap = np.asarray(gap_m, float)
        dv2 = (bias_v - float(self.cpd_v(x_m, y_m))) ** 2
        return self._short_range.force(gap) + self._capacitance.force_per_v2(gap) * dv2

    def _tables_for(self, amp: float) -> tuple[AveragedTable, AveragedTable, AveragedTable | None]:
        if amp not in self._tables:
            es = AveragedTable(self._capacitance.force_per_v2, self._capacitance.gradient_per_v2, amp)
            sr = AveragedTable(self._short_range.force, self._short_range.gradient, amp)
            induced = None
            if self.spec.susceptibility > 0.0:
                floor = 0.5e-9  # the probe itself never reaches the film; keeps the table finite

                def parts(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
                    return magnetism.induced_response(
                        np.maximum(z, floor), susceptibility=self.spec.susceptibility,
                        thickness_m=self.spec.thickness_nm * 1e-9, moment_a_m2=self.tip.moment_a_m2,
                        monopole_a_m=self.tip.monopole_a_m)
                induced = AveragedTable(lambda z: parts(z)[0], lambda z: parts(z)[1], amp)
            self._tables[amp] = (es, sr, induced)
        return self._tables[amp]

    # ----------------------------------------------------------------------------------------- magnetic
    def _stray_field(self) -> magnetism.StrayField:
        if self._stray is None:
            self._stray = magnetism.StrayField(self._mx, self._mz, pixel_m=self.pixel_m,
                                               thickness_m=self.spec.thickness_nm * 1e-9, halo_px=_HALO_PX)
        return self._stray

    def _node(self, amp: float, z_node: float) -> np.ndarray:
        key = (amp, z_node)
        self._node_uses[key] = self._node_uses.get(key, 0) + 1
        if key in self._nodes:
            return self._nodes[key]
        maps = self._node_maps(self._stray_field(), amp, z_node)
        self._nodes[key] = maps
        # Over budget, drop the least used node (oldest first among equals). Plain LRU would thrash on the
        # cyclic order of a lift series (every height once per line) as soon as the heights exceed the budget.
        # Default budget 1 GiB: 13 nodes of a 2000^2 film (80 MB each).
        while len(self._nodes) > 1 and maps.nbytes * len(self._nodes) > self._cache_bytes:
            victim = min((k for k in self._nodes if k != key), key=lambda k: self._node_uses.get(k, 0))
            del self._nodes[victim]
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

    def _update_nodes(self, pixels: np.ndarray, old_values: np.ndarray, in_plane: bool) -> None:
        """Add the field of the switched pixels (Delta M = -2 M_old) to every cached node map.

        Computed on local windows around the switched pixels, with a margin of at least ten times the node's
        probe height (nodes share windows whose margins are powers of two): the field of a switched patch
        falls off at least as (z/r)^3 laterally, so what lies beyond the margin is below 1e-3 of the change.
        Much cheaper than rebuilding every node; equal to a rebuild to 2e-7 of the change in the tests.
        """
        self._stray = None  # the full spectrum is rebuilt only if a new node is needed
        if not self._nodes:
            return
        rows, cols = np.divmod(pixels, self.n)
        buckets: dict[int, list[tuple[float, float]]] = {}
        for amp, z_node in self._nodes:
            need = max(16.0, 10.0 * z_node / self.pixel_m)
            buckets.setdefault(16 * 2 ** math.ceil(math.log2(need / 16.0)), []).append((amp, z_node))
        for margin, keys in buckets.items():
            r0, r1 = max(rows.min() - margin, 0), min(rows.max() + margin + 1, self.n)
            c0, c1 = max(cols.min() - margin, 0), min(cols.max() + margin + 1, self.n)
            delta = np.zeros((r1 - r0, c1 - c0))
            delta[rows - r0, cols - c0] = -2.0 * old_values
            zeros = np.zeros_like(delta)
            local = magnetism.StrayField(delta if in_plane else zeros, zeros if in_plane else delta,
                                         pixel_m=self.pixel_m, thickness_m=self.spec.thickness_nm * 1e-9,
                                         pad_m=margin * self.pixel_m, halo_px=_HALO_PX)
            h = local.halo_px
            for key in keys:
                self._nodes[key][:, r0:r1 + 2 * h, c0:c1 + 2 * h] += self._node_maps(local, *key)

    def _magnetic(self, x: np.ndarray, y: np.ndarray, zp: np.ndarray, amp: float
                  ) -> tuple[np.ndarray, np.ndarray]:
        shape = zp.shape
        x, y, zp = x.ravel(), y.ravel(), zp.ravel()
        lz = np.log(zp)
        node_of = np.full(zp.shape, -1)
        heights: list[float] = [z for (a, z) in self._nodes if a == amp]
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

    # ------------------------------------------------------------------------------------------- expose
    def expose(self, x_m: np.ndarray, y_m: np.ndarray, gap_m: np.ndarray) -> int:
        """Irreversible switching under the tip: pixels whose magnetisation axis sees a tip field above the
        coercive field take the direction of that field (the last such tip position in the input order wins).
        Tip field = point dipole/monopole at the film's top surface. Returns the number of pixels switched.
        """
        x, y, gap = np.broadcast_arrays(np.asarray(x_m, float), np.asarray(y_m, float),
                                        np.asarray(gap_m, float))
        x, y, gap = x.ravel(), y.ravel(), gap.ravel()
        hc = self.spec.coercive_field_ka_per_m * 1e3
        reach = field_reach_m(self.tip.moment_a_m2, self.tip.monopole_a_m, hc)
        zp = np.maximum(self.probe_height_m(x, y, gap), 1e-10)
        near = zp < reach
        if not near.any():
            return 0
        x, y, zp = x[near], y[near], zp[near]
        radius_px = math.ceil(math.sqrt(max(reach**2 - zp.min() ** 2, 0.0)) / self.pixel_m) + 1
        offs = np.arange(-radius_px, radius_px + 1)
        di, dj = (a.ravel() for a in np.meshgrid(offs, offs, indexing="ij"))
        half = 0.5 * self.n * self.pixel_m
        ci = np.rint((y + half) / self.pixel_m - 0.5).astype(int)
        cj = np.rint((x + half) / self.pixel_m - 0.5).astype(int)
        ii, jj = ci[:, None] + di[None, :], cj[:, None] + dj[None, :]
        inside = (ii >= 0) & (ii < self.n) & (jj >= 0) & (jj < self.n)
        xc = (jj + 0.5) * self.pixel_m - half
        yc = (ii + 0.5) * self.pixel_m - half
        hx, _, hz = point_probe_field(xc - x[:, None], yc - y[:, None], np.broadcast_to(zp[:, None], xc.shape),
                                      moment_a_m2=self.tip.moment_a_m2, monopole_a_m=self.tip.monopole_a_m)
        in_plane = self._in_plane
        h_axis = hx if in_plane else hz
        strong = inside & (np.abs(h_axis) > hc)
        if not strong.any():
            return 0
        # Keep, per pixel, the last strong tip position (rows are in input order).
        flat = (ii * self.n + jj)[strong]
        sign = np.sign(h_axis[strong])
        last = len(flat) - 1 - np.unique(flat[::-1], return_index=True)[1]
        pix, new_sign = flat[last], sign[last]
        target = (self._mx if in_plane else self._mz).reshape(-1)
        current = target[pix]
        flip = (current != 0.0) & (np.sign(current) != new_sign)
        count = int(np.count_nonzero(flip))
        if count:
            target[pix[flip]] = -current[flip]
            self._version += 1
            self._update_nodes(pix[flip], current[flip], in_plane)
        return count


def _amplitude_key(amplitude_m: float) -> float:
    """Amplitude rounded to 4 significant digits so that noisy amplitudes share the caches (<= 0.05 %)."""
    a = float(amplitude_m)
    if not math.isfinite(a) or a < 0.0:
        raise ValueError(f"amplitude_m = {amplitude_m!r} must be a finite number >= 0")
    return float(f"{a:.4g}") if a > 0.0 else 0.0
