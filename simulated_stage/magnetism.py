"""Magnetic film: written patterns -> magnetisation maps -> stray field by FFT of the magnetic charges.

Film between z' = -t and 0, magnetisation uniform through the thickness; observation height z above the top
surface. For each 2-D wavevector k (|k| = k) the charge formulation gives exactly (Hug et al. 1998, J. Appl.
Phys. 83, 5609; the spacing and thickness losses of Wallace 1951, Bell Syst. Tech. J. 30, 1145; both from
memory, re-derived):

    H_z(k, z) = 1/2 exp(-k z) (1 - exp(-k t)) [M_z(k) - i (k_x M_x(k) + k_y M_y(k)) / k],
    H_x = -i (k_x/k) H_z,   d^n H_z / dz^n = (-k)^n H_z,   k = 0 term set to zero.

Each map pixel is treated as a uniformly magnetised square prism (the spectrum carries the pixel's sinc
factors), so a pattern that is piecewise constant on the pixels is represented exactly up to aliasing of
order exp(-pi z / pixel). Maps are zero padded so that the periodic images of the film stay at least
``pad_m`` away. Arrays are (rows = y, columns = x); pixel (i, j) has its centre at
x = (j + 1/2) pixel - extent/2, y = (i + 1/2) pixel - extent/2.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from simulated_stage.averaging import exponential_force_weight, exponential_gradient_weight

MU_0 = 1.25663706127e-6  # N/A^2, CODATA 2022
PATTERNS = ("oop_tracks", "inplane_bits", "dots", "random_domains", "stripes", "uniform")


def pixel_centres_m(n: int, pixel_m: float) -> np.ndarray:
    """Coordinates of the pixel centres along one axis [m] (map centred on 0)."""
    return (np.arange(n) + 0.5) * pixel_m - 0.5 * n * pixel_m


# ----------------------------------------------------------------------------------------------- patterns
def _square_wave_cell_average(x_m: np.ndarray, pixel_m: float, period_m: float) -> np.ndarray:
    """Cell average of sign(cos(2 pi x / p)) over [x - pixel/2, x + pixel/2] (exact, via its antiderivative)."""
    def antiderivative(u: np.ndarray) -> np.ndarray:
        # Triangle wave: integral of the square wave that is +1 on |u| < p/4 (mod p).
        v = np.mod(u + period_m / 4.0, period_m)
        return np.where(v < period_m / 2.0, v, period_m - v) - period_m / 4.0
    return (antiderivative(x_m + pixel_m / 2.0) - antiderivative(x_m - pixel_m / 2.0)) / pixel_m


def _smooth_transitions_x(values: np.ndarray, pixel_m: float, width_m: float, shape: str) -> np.ndarray:
    """Replace sharp steps along x by tanh(x/a) or (2/pi) arctan(x/a) transitions (linear superposition).

    Convolution along rows with the derivative of the transition profile: (1/2a) sech^2(x/a) gives tanh
    (domain walls); (a/pi)/(x^2 + a^2) gives the arctan transition of Williams & Comstock 1971 (AIP Conf.
    Proc. 5, 738; from memory). Done by FFT with zero padding of half a row on each side.
    """
    if width_m <= 0.0:
        return values
    n = values.shape[1]
    m = sfft.next_fast_len(2 * n)
    f = sfft.rfftfreq(m, d=pixel_m)
    k = 2.0 * np.pi * f
    a = width_m
    if shape == "tanh":
        # Fourier transform of (1/2a) sech^2(x/a): (pi k a / 2) / sinh(pi k a / 2).
        u = np.pi * k * a / 2.0
        kernel = np.ones_like(u)
        kernel[1:] = u[1:] / np.sinh(np.minimum(u[1:], 700.0))
    else:
        kernel = np.exp(-k * a)  # transform of the Lorentzian (a/pi)/(x^2 + a^2)
    spec = sfft.rfft(values, n=m, axis=1) * kernel
    return sfft.irfft(spec, n=m, axis=1)[:, :n]


def _track_data(n: int, pixel_m: float, period_m: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Written tracks along x: pitch 2 p in y (track 1.6 p, guard band 0.4 p), bit cells p/2 long, random data.

    Returns (sign map of the written data with +1 in the guard bands, track mask).
    """
    x = pixel_centres_m(n, pixel_m)
    pitch = 2.0 * period_m
    y_in_pitch = np.mod(x + pitch / 2.0, pitch)  # same grid in y
    in_track = np.abs(y_in_pitch - pitch / 2.0) < 0.8 * period_m
    track_index = np.floor((x + pitch / 2.0) / pitch).astype(int)
    cell_index = np.floor(x / (period_m / 2.0)).astype(int)
    n_tracks = track_index.max() - track_index.min() + 1
    n_cells = cell_index.max() - cell_index.min() + 1
    bits = rng.choice(np.array([-1.0, 1.0]), size=(n_tracks, n_cells))
    sign = bits[(track_index - track_index.min())[:, None], (cell_index - cell_index.min())[None, :]]
    mask = in_track[:, None] & np.ones(n, bool)[None, :]
    return np.where(mask, sign, 1.0), mask.astype(float)


def pattern_maps(pattern: str, *, n: int, pixel_m: float, period_m: float, transition_m: float,
                 ms_a_per_m: float, rng: np.random.Generator,
                 tracks=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Magnetisation maps (M_x, M_z) [A/m] and the topographic feature mask (0..1) of a film pattern.

    Patterns: ``oop_tracks`` (perpendicular written tracks, tanh transitions, DC-erased guard bands),
    ``inplane_bits`` (the same track layout magnetised along +-x, arctan transitions), ``dots`` (perpendicular
    dots of diameter p/2 on a square lattice of period p, random polarity), ``random_domains`` (smoothed
    Gaussian random field of correlation length ~p/4 thresholded, tanh walls), ``stripes`` (square wave along
    x, domain centred at x = 0 positive, exact cell averages, sharp walls), ``uniform`` (+M_z everywhere).
    With ``tracks`` (a :class:`simulated_stage.recording.TrackLayout`) the two track patterns follow that layout
    instead: bit length, pitch, width, write jitter, erase bands and old data (:mod:`simulated_stage.recording`).
    """
    x = pixel_centres_m(n, pixel_m)
    zeros = np.zeros((n, n))
    if pattern == "uniform":
        return zeros, np.full((n, n), ms_a_per_m), zeros
    if pattern == "stripes":
        row = _square_wave_cell_average(x, pixel_m, period_m)
        return zeros, np.broadcast_to(row * ms_a_per_m, (n, n)).copy(), zeros
    if pattern in ("oop_tracks", "inplane_bits") and tracks is not None:
        from simulated_stage.recording import written_tracks

        shape = "tanh" if pattern == "oop_tracks" else "arctan"
        m, mask = written_tracks(n, pixel_m, tracks, transition_m=max(transition_m, 0.25 * pixel_m), shape=shape,
                                 rng=rng)
        m = m * ms_a_per_m
        return (zeros, m, mask) if pattern == "oop_tracks" else (m, zeros, mask)
    if pattern in ("oop_tracks", "inplane_bits"):
        sign, mask = _track_data(n, pixel_m, period_m, rng)
        shape = "tanh" if pattern == "oop_tracks" else "arctan"
        m = np.clip(_smooth_transitions_x(sign, pixel_m, transition_m, shape), -1.0, 1.0) * ms_a_per_m
        return (zeros, m, mask) if pattern == "oop_tracks" else (m, zeros, mask)
    if pattern == "dots":
        u = np.mod(x + period_m / 2.0, period_m) - period_m / 2.0  # offset from the nearest dot centre
        r = np.hypot(u[:, None], u[None, :])
        coverage = np.clip(0.5 - (r - period_m / 4.0) / pixel_m, 0.0, 1.0)  # anti-aliased dot edge
        idx = np.floor((x + period_m / 2.0) / period_m).astype(int)
        idx -= idx.min()
        polarity = rng.choice(np.array([-1.0, 1.0]), size=(idx.max() + 1, idx.max() + 1))
        return zeros, coverage * polarity[idx[:, None], idx[None, :]] * ms_a_per_m, coverage
    if pattern == "random_domains":
        noise = rng.standard_normal((n, n))
        field = ndimage.gaussian_filter(noise, sigma=period_m / 4.0 / pixel_m, mode="wrap")
        field /= field.std()
        # tanh walls of width a across the zero level set: grad |field| converts level to distance.
        gy, gx = np.gradient(field, pixel_m)
        dist = field / np.maximum(np.hypot(gx, gy), 1e-30)
        m = np.tanh(dist / max(transition_m, 0.5 * pixel_m)) * ms_a_per_m
        return zeros, m, zeros
    raise ValueError(f"pattern = {pattern!r} is not one of {', '.join(PATTERNS)}")


def roughness_map(n: int, pixel_m: float, rms_m: float, rng: np.random.Generator,
                  correlation_m: float = 20e-9) -> np.ndarray:
    """Gaussian-correlated random topography of rms ``rms_m`` [m] (correlation length ~20 nm, no source)."""
    if rms_m == 0.0:
        return np.zeros((n, n))
    h = ndimage.gaussian_filter(rng.standard_normal((n, n)), sigma=max(correlation_m / pixel_m, 0.5),
                                mode="wrap")
    return h * (rms_m / h.std())


# -------------------------------------------------------------------------------------------- stray field
class StrayField:
    """Spectrum of the film's stray field; maps of H and its z-derivatives at any height above the film.

    Parameters
    ----------
    mx_a_per_m, mz_a_per_m : magnetisation maps [A/m], shape (ny, nx) (rows = y); square for a film,
        any rectangle for a local patch (the incremental update after switching).
    pixel_m : pixel side [m]; thickness_m : film thickness t [m].
    pad_m : minimum zero padding between the film and its periodic images [m].
    halo_px : extra pixels kept around the film in every returned map (for spline coefficients).
    """

    def __init__(self, mx_a_per_m: np.ndarray, mz_a_per_m: np.ndarray, *, pixel_m: float,
                 thickness_m: float, pad_m: float = 0.4e-6, halo_px: int = 3, workers: int = 2) -> None:
        self.ny, self.nx = mz_a_per_m.shape
        self.n = self.ny  # side of a square film map
        self.pixel_m, self.thickness_m, self.halo_px, self.workers = pixel_m, thickness_m, halo_px, workers
        pad = max(4 * halo_px, 32, math.ceil(pad_m / pixel_m))
        self.shape = (sfft.next_fast_len(self.ny + pad, real=True), sfft.next_fast_len(self.nx + pad, real=True))
        self.size = self.shape[0]
        # film placed in the middle of the padded grid
        self.offsets = ((self.shape[0] - self.ny) // 2, (self.shape[1] - self.nx) // 2)
        fy = sfft.fftfreq(self.shape[0], d=pixel_m)[:, None]
        fx = sfft.rfftfreq(self.shape[1], d=pixel_m)[None, :]
        kx, ky = 2.0 * np.pi * fx, 2.0 * np.pi * fy
        self.k = np.hypot(kx, ky)
        k_safe = np.where(self.k == 0.0, 1.0, self.k)
        sinc = np.sinc(fx * pixel_m) * np.sinc(fy * pixel_m)  # pixel = uniformly magnetised prism
        charge = self._rfft(mz_a_per_m).astype(complex)
        if np.any(mx_a_per_m):
            charge -= 1j * kx * self._rfft(mx_a_per_m) / k_safe
        base = 0.5 * (-np.expm1(-self.k * thickness_m)) * charge * sinc
        base[0, 0] = 0.0
        self.base = base  # H_z(k, z) = base * exp(-k z)
        self._kx_over_k = kx / k_safe
        # Cubic B-spline prefilter of the padded (periodic) grid, applied in Fourier space: 1/((2 + cos w)/3)
        # per axis, so that scipy.ndimage.map_coordinates(order=3, prefilter=False) interpolates the samples.
        wx, wy = 2.0 * np.pi * fx * pixel_m, 2.0 * np.pi * fy * pixel_m
        self.spline_prefilter = 9.0 / ((2.0 + np.cos(wx)) * (2.0 + np.cos(wy)))
        self._weights: dict[float, tuple[np.ndarray, np.ndarray]] = {}
        self._point_spectra: dict[float, tuple[np.ndarray, np.ndarray]] = {}

    def _rfft(self, m: np.ndarray) -> np.ndarray:
        padded = np.zeros(self.shape)
        oy, ox = self.offsets
        padded[oy:oy + self.ny, ox:ox + self.nx] = m
        return sfft.rfft2(padded, workers=self.workers)

    def to_map(self, spectrum: np.ndarray, *, spline: bool = False, dtype: type = np.float64) -> np.ndarray:
        """Inverse transform cropped to the film plus ``halo_px``; optionally as cubic-spline coefficients."""
        if spline:
            spectrum = spectrum * self.spline_prefilter
        full = sfft.irfft2(spectrum, s=self.shape, workers=self.workers)
        (oy, ox), h = self.offsets, self.halo_px
        return np.ascontiguousarray(full[oy - h:oy + self.ny + h, ox - h:ox + self.nx + h], dtype=dtype)

    def hz(self, height_m: float, order: int = 0) -> np.ndarray:
        """d^order H_z / dz^order [A/m^(1+order)] at height z above the film top (map incl. halo)."""
        return self.to_map(self.base * np.exp(-self.k * height_m) * (-self.k) ** order)

    def hx(self, height_m: float) -> np.ndarray:
        """H_x [A/m] at height z above the film top (map incl. halo)."""
        return self.to_map(-1j * self._kx_over_k * self.base * np.exp(-self.k * height_m))

    def probe_spectra(self, probe_height_m: float, amplitude_m: float, *, moment_a_m2: float,
                      monopole_a_m: float) -> tuple[np.ndarray, np.ndarray]:
        """Spectra of the oscillation-averaged force <F> [N] and Giessibl-weighted gradient <F'> [N/m].

        Point probe (Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53): F = mu0 (q H_z + m dH_z/dz), so per
        component F(k) = mu0 (q - m k) H_z(k, z_p) and F'(k) = -k F(k); the cycle averages multiply them by
        I0(kA) and 2 I1(kA)/(kA) (averaging.py). ``probe_height_m`` is the probe centre above the film top
        and must exceed the amplitude.
        """
        if probe_height_m <= amplitude_m:
            raise ValueError(f"probe height {probe_height_m:g} m must exceed the amplitude {amplitude_m:g} m")
        decay = np.exp(-self.k * (probe_height_m - amplitude_m))  # scaled Bessel weights carry exp(-kA)
        force, gradient = self._undecayed(amplitude_m, moment_a_m2, monopole_a_m)
        return force * decay, gradient * decay

    def _undecayed(self, amplitude_m: float, moment_a_m2: float, monopole_a_m: float
                   ) -> tuple[np.ndarray, np.ndarray]:
        if amplitude_m not in self._weights:
            self._weights[amplitude_m] = (exponential_force_weight(self.k, amplitude_m),
                                          -self.k * exponential_gradient_weight(self.k, amplitude_m))
        w_force, w_gradient = self._weights[amplitude_m]
        f_k = MU_0 * (monopole_a_m - moment_a_m2 * self.k) * self.base
        return f_k * w_force, f_k * w_gradient

    def probe_at_points(self, x_m: np.ndarray, y_m: np.ndarray, probe_height_m: np.ndarray, amplitude_m: float,
                        *, moment_a_m2: float, monopole_a_m: float) -> tuple[np.ndarray, np.ndarray]:
        """<F> [N] and <F'> [N/m] of the point probe at a few points, by direct Fourier summation.

        The band-limited (trigonometric) interpolant of the same spectra that the maps sample; about 20 ms
        per point on the default grid, against ~0.4 s for a full map, so used for calls of a handful of
        points at heights with no cached map (single-point reads during an approach). Points are given in
        the film frame (map centred on 0).
        """
        if amplitude_m not in self._point_spectra:
            force, grad = self._undecayed(amplitude_m, moment_a_m2, monopole_a_m)
            weight = np.full(self.k.shape[1], 2.0)  # rfft half plane: columns 1 .. N/2-1 stand for two
            weight[0] = 1.0
            if self.shape[1] % 2 == 0:
                weight[-1] = 1.0
            self._point_spectra = {amplitude_m: (force * weight, grad * weight)}  # one amplitude at a time
        force_w, grad_w = self._point_spectra[amplitude_m]
        ny, nx = self.shape
        fy = np.fft.fftfreq(ny)
        fx = np.fft.rfftfreq(nx)
        oy, ox = self.offsets
        out_f, out_g = [], []
        k_y = np.abs(2.0 * np.pi * fy / self.pixel_m)
        k_x = 2.0 * np.pi * fx / self.pixel_m
        for x, y, z in zip(np.ravel(x_m), np.ravel(y_m), np.ravel(probe_height_m)):
            row = oy + (y + 0.5 * self.ny * self.pixel_m) / self.pixel_m - 0.5  # padded-grid position
            col = ox + (x + 0.5 * self.nx * self.pixel_m) / self.pixel_m - 0.5
            # components with k (z - A) > 36 are below 1e-15 of the rest: far from the film few remain
            k_cut = 36.0 / (z - amplitude_m)
            rows, cols = np.nonzero(k_y <= k_cut)[0], np.nonzero(k_x <= k_cut)[0]
            if rows.size == ny and cols.size == fx.size:
                k, fw, gw, ry, cx = self.k, force_w, grad_w, fy, fx
            else:
                block = np.ix_(rows, cols)
                k, fw, gw, ry, cx = self.k[block], force_w[block], grad_w[block], fy[rows], fx[cols]
            decay = np.exp(-k * (z - amplitude_m))
            a = np.exp(2j * np.pi * ry * row)
            b = np.exp(2j * np.pi * cx * col)
            out_f.append((a @ (fw * decay) @ b).real / (ny * nx))
            out_g.append((a @ (gw * decay) @ b).real / (ny * nx))
        shape = np.shape(x_m)
        return np.asarray(out_f).reshape(shape), np.asarray(out_g).reshape(shape)


def map_coordinates_px(x_m: np.ndarray, y_m: np.ndarray, *, pixel_m: float, n: int, halo_px: int) -> np.ndarray:
    """(2, N) array of (row, column) positions of points (x, y) [m] in a map with ``halo_px`` extra pixels.

    Points outside the map are clamped to its edge (the extent must cover the scan area).
    """
    half = 0.5 * n * pixel_m
    hi = n + 2 * halo_px - 1.0
    col = np.clip((np.ravel(x_m) + half) / pixel_m - 0.5 + halo_px, 0.0, hi)
    row = np.clip((np.ravel(y_m) + half) / pixel_m - 0.5 + halo_px, 0.0, hi)
    return np.stack([row, col])


def cubic_bspline_at(coefficients: np.ndarray, coords: np.ndarray) -> np.ndarray:
    """Evaluate cubic B-spline coefficient maps (..., H, W) at (2, N) (row, column) positions -> (..., N).

    The same interpolant as scipy.ndimage.map_coordinates(order=3, prefilter=False) away from the edges,
    but the 4 x 4 weights are computed once for a whole stack of maps (the five maps of a height node).
    Positions are clamped to [1, H - 2] x [1, W - 2] (the halo keeps every film point inside that range).
    """
    h, w = coefficients.shape[-2:]
    out = []
    for size, pos in ((h, coords[0]), (w, coords[1])):
        t = np.clip(pos, 1.0, size - 2.0 - 1e-9)
        i = np.floor(t).astype(np.intp)
        u = t - i
        u2, u3 = u * u, u * u * u
        weights = np.stack([(1.0 - u) ** 3, 3.0 * u3 - 6.0 * u2 + 4.0, -3.0 * u3 + 3.0 * u2 + 3.0 * u + 1.0, u3]) / 6.0
        out.append((i[None, :] + np.arange(-1, 3)[:, None], weights))  # (4, N) indices and weights
    (ri, rw), (ci, cw) = out
    flat_index = (ri[:, None, :] * w + ci[None, :, :]).reshape(16, -1)     # (16, N)
    weight = (rw[:, None, :] * cw[None, :, :]).reshape(16, -1)
    stack = coefficients.reshape(coefficients.shape[:-2] + (h * w,))
    patch = np.take(stack, flat_index, axis=-1)                            # (..., 16, N)
    return (patch * weight).sum(axis=-2)


def bilinear_at(values: np.ndarray, coords: np.ndarray) -> np.ndarray:
    """Bilinear interpolation of a (H, W) map at (2, N) positions, clamped to the map."""
    h, w = values.shape
    r = np.clip(coords[0], 0.0, h - 1.0)
    c = np.clip(coords[1], 0.0, w - 1.0)
    r0 = np.minimum(np.floor(r).astype(np.intp), h - 2)
    c0 = np.minimum(np.floor(c).astype(np.intp), w - 2)
    fr, fc = r - r0, c - c0
    top = values[r0, c0] * (1.0 - fc) + values[r0, c0 + 1] * fc
    bottom = values[r0 + 1, c0] * (1.0 - fc) + values[r0 + 1, c0 + 1] * fc
    return top * (1.0 - fr) + bottom * fr


def sample_map(values: np.ndarray, x_m: np.ndarray, y_m: np.ndarray, *, pixel_m: float, n: int,
               halo_px: int, order: int) -> np.ndarray:
    """Interpolate a (n + 2 halo)^2 map at points (x, y) [m]; order 3 expects spline coefficients."""
    coords = map_coordinates_px(x_m, y_m, pixel_m=pixel_m, n=n, halo_px=halo_px)
    out = ndimage.map_coordinates(values, coords, order=order, prefilter=False, mode="nearest")
    return out.reshape(np.shape(x_m))


# ------------------------------------------------------------------------------------ reversible response
def induced_response(probe_height_m: np.ndarray, *, susceptibility: float, thickness_m: float,
                     moment_a_m2: float, monopole_a_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Force F [N] and gradient F' [N/m] from the film's induced (reversible) response to the tip field.

    A soft film of small susceptibility chi (demagnetising corrections neglected, chi << 1) acquires
    M = chi H_tip; its energy is U = -(mu0 chi / 2) integral |H_tip|^2 dV over the slab s <= depth <= s + t
    below the probe (linear magnetic media, e.g. Jackson, Classical Electrodynamics, 3rd ed., sec. 5.16;
    from memory). With the point probe (z-dipole m, monopole q) the plane integrals are elementary:
    integral |H|^2 dA over a plane at distance u = [3 m^2 / (2 u^4) + q^2 / u^2 - 2 q m / u^3] / (16 pi)
    (derived here). U <= 0 whatever the sign of the domains below, so F < 0 and the force always attracts.
    """
    s = np.asarray(probe_height_m, float)
    b = s + thickness_m
    m, q = moment_a_m2, monopole_a_m
    # integral over u from s to s + t of the plane integral, written as G(s) - G(s + t)
    def g(u: np.ndarray) -> np.ndarray:
        return (m * m / (2.0 * u**3) + q * q / u - q * m / u**2) / (16.0 * np.pi)
    def dg(u: np.ndarray) -> np.ndarray:   # dG/du = -(plane integral)
        return -(3.0 * m * m / (2.0 * u**4) + q * q / u**2 - 2.0 * q * m / u**3) / (16.0 * np.pi)
    def d2g(u: np.ndarray) -> np.ndarray:
        return (6.0 * m * m / u**5 + 2.0 * q * q / u**3 - 6.0 * q * m / u**4) / (16.0 * np.pi)
    pref = -0.5 * MU_0 * susceptibility          # U = pref * (G(s) - G(s + t))
    force = -pref * (dg(s) - dg(b))
    gradient = -pref * (d2g(s) - d2g(b))
    return force, gradient
