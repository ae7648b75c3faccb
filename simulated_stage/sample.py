"""The virtual sample: topography, magnetic film, contact potential, and the tip-sample interaction.

Geometry: x along the fast axis, y along the slow axis, metres, in the sample frame; the map is centred on
(0, 0). ``gap_m`` is the apex-to-local-surface distance at the centre of the oscillation. The magnetic film's
top surface is a flat plane at the height of the tallest features (``feature_height_nm`` for dots/tracks,
else 0), so the magnetic height of the probe is gap + topography - plane + effective distance.
Sign convention: F > 0 repulsive, F' = dF/dz (attractive and strengthening on approach: F < 0, F' > 0).

Caches:
* the magnetic point-probe interaction from cached spline maps of the film's field
  (:mod:`simulated_stage.magnetic_maps`), updated in place when ``expose`` switches pixels and dropped when the
  applied field (``apply_field``, the magnet's) switches elements all over the film;
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
from simulated_stage.dots import DotElements, tip_direction
from simulated_stage.electrostatics import TipCapacitance
from simulated_stage.errors import ScenarioError
from simulated_stage.magnetic_maps import MagneticProbeMaps
from simulated_stage.tip import TipSpec, check_range, field_reach_m, point_probe_field, spec_from_table

_MAX_PIXELS = 8192


@dataclass(frozen=True)
class SampleSpec:
    """Sample description (scenario table ``[sample]``); see the module docstring for the geometry."""

    pattern: str = "oop_tracks"
    period_nm: float = 400.0
    transition_width_nm: float = 20.0
    saturation_magnetisation_ka_per_m: float = 800.0
    thickness_nm: float = 20.0
    coercive_field_ka_per_m: float = 200.0  # dots: the mean of their switching fields
    switching_field_spread_ka_per_m: float = 0.0  # dots: standard deviation of their switching fields
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
        check_range(s, "switching_field_spread_ka_per_m", self.switching_field_spread_ka_per_m, 0.0, 1e4)
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
        self._dots = None if spec.pattern != "dots" else DotElements(
            mz, pixel_m=self.pixel_m, period_m=spec.period_nm * 1e-9,
            switching_mean_a_per_m=spec.coercive_field_ka_per_m * 1e3,
            switching_spread_a_per_m=spec.switching_field_spread_ka_per_m * 1e3,
            rng=np.random.default_rng(np.random.SeedSequence(spec.seed).spawn(3)[2]))
        self._applied_a_per_m = 0.0  # uniform field of the magnet along +z
        self._tip_sign = 1.0  # -1 once the tip's coating has reversed
        rough = magnetism.roughness_map(self.n, self.pixel_m, spec.roughness_nm * 1e-9,
                                        np.random.default_rng(rough_seed))
        self._topography = rough + spec.feature_height_nm * 1e-9 * features
        self._plane_m = spec.feature_height_nm * 1e-9 if np.any(features) else 0.0
        self.true_cpd_v = spec.cpd_v
        self._patch_sigma_m = min(1e-6, spec.extent_um * 1e-6 / 8.0)
        self._version = 0
        #: the magnetic point-probe interaction, from cached maps of the film's field (switched in place)
        self.magnetic = MagneticProbeMaps(mx, mz, pixel_m=self.pixel_m, thickness_m=spec.thickness_nm * 1e-9,
                                          tip=tip, cache_bytes=cache_bytes)
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
        f_mag, g_mag = self.magnetic.at(x, y, zp, amp)
        if self._tip_sign < 0:  # the interaction is linear in the tip's moment and charge
            f_mag, g_mag = -f_mag, -g_mag
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

    def true_hz_a_per_m(self, x_m: np.ndarray, y_m: np.ndarray, height_m: float) -> np.ndarray:
        """The film's H_z [A/m] at (x, y) [m], ``height_m`` above its top: for tests of field maps only (see
        :meth:`MagneticProbeMaps.true_hz_a_per_m`; no instrument reports it, so no controller method does)."""
        return self.magnetic.true_hz_a_per_m(x_m, y_m, height_m)

    # ------------------------------------------------------------------------------------------- expose
    def expose(self, x_m: np.ndarray, y_m: np.ndarray, gap_m: np.ndarray) -> int:
        """Irreversible switching under the tip: pixels whose magnetisation axis sees a tip field above the
        coercive field take the direction of that field (the last such tip position in the input order wins).
        Tip field = point dipole/monopole at the film's top surface. Returns the number of pixels switched.
        """
        x, y, gap = np.broadcast_arrays(np.asarray(x_m, float), np.asarray(y_m, float),
                                        np.asarray(gap_m, float))
        x, y, gap = x.ravel(), y.ravel(), gap.ravel()
        m, q = self.tip.moment_a_m2 * self._tip_sign, self.tip.monopole_a_m * self._tip_sign
        if self._dots is not None:  # single-domain dots reverse as a whole (simulated_stage.dots)
            pix, old = self._dots.expose(x, y, self.probe_height_m(x, y, gap), field_a_per_m=self._applied_a_per_m,
                                         moment_a_m2=m, monopole_a_m=q)
            return self._switched(pix, old)
        hc = self.spec.coercive_field_ka_per_m * 1e3
        h_app = 0.0 if self._in_plane else self._applied_a_per_m  # the magnet's field is along z
        reach = field_reach_m(m, q, max(hc - abs(h_app), 1e-3 * hc))
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
                                      moment_a_m2=m, monopole_a_m=q)
        in_plane = self._in_plane
        h_axis = hx if in_plane else hz + h_app
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
            self.magnetic.switched(pix[flip], current[flip], in_plane)
        return count

    # ------------------------------------------------------------------------------------- applied field
    def apply_field(self, field_a_per_m: float) -> int:
        """A uniform applied field along +z [A/m] (the magnet's): the tip's coating reverses past its coercive
        field, dots past their own switching fields, any other out-of-plane film as a whole past its coercive
        field (an in-plane film does not respond to it). Returns the number of pixels reversed."""
        h = float(field_a_per_m)
        self._applied_a_per_m = h
        base = np.sign(self.tip.moment_a_m2) or -np.sign(self.tip.monopole_a_m) or 1.0  # q < 0 when m > 0
        self._tip_sign = base * tip_direction(base * self._tip_sign, h, self.tip.coercive_field_ka_per_m * 1e3)
        if self._dots is not None:
            return self._switched(*self._dots.apply_field(h), bulk=True)
        if self._in_plane or not abs(h) > self.spec.coercive_field_ka_per_m * 1e3:
            return 0
        flat = self._mz.reshape(-1)
        pix = np.flatnonzero(flat * h < 0.0)
        old = flat[pix].copy()
        flat[pix] = -old
        return self._switched(pix, old, bulk=True)

    @property
    def tip_reversed(self) -> bool:
        """Whether the tip's coating points against its scenario moment (reversed by the applied field)."""
        return self._tip_sign < 0

    def _switched(self, pixels: np.ndarray, old_values: np.ndarray, *, bulk: bool = False) -> int:
        """Bring the caches up to date after a switch; a field step's switching (``bulk``) is spread over the
        whole film, where updating every cached node costs more than building again the few the next lines use."""
        if pixels.size:
            self._version += 1
            if bulk:
                self.magnetic.clear()
            else:
                self.magnetic.switched(pixels, old_values, False)
        return int(pixels.size)


def _amplitude_key(amplitude_m: float) -> float:
    """Amplitude rounded to 4 significant digits so that noisy amplitudes share the caches (<= 0.05 %)."""
    a = float(amplitude_m)
    if not math.isfinite(a) or a < 0.0:
        raise ValueError(f"amplitude_m = {amplitude_m!r} must be a finite number >= 0")
    return float(f"{a:.4g}") if a > 0.0 else 0.0
