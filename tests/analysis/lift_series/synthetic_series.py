"""Synthetic lift-height series built from the published physics, independently of the analysis code.

Every part is computed here from its textbook form with general-purpose numerics (numpy FFTs, finite
differences, scipy.integrate.quad), not with the project's analysis or simulator functions:

* magnetic: a thin film with random up/down domains; per Fourier component the stray field above the film
  is ``H_z(q, z) = 1/2 exp(-q z) (1 - exp(-q t)) M_z(q)`` (Hug et al. 1998, J. Appl. Phys. 83, 5609;
  Wallace 1951, Bell Syst. Tech. J. 30, 1145; from memory) and a point-dipole tip (Hartmann 1999,
  Annu. Rev. Mater. Sci. 29, 53) sitting ``delta`` behind the apex feels ``F' = mu0 m q^2 H_z``;
* electrostatic: the exact sphere-plane capacitance series (Smythe 1968, Static and Dynamic Electricity),
  ``C''`` by a five-point finite difference, or (``apex="hudlet"``) the apex term of Hudlet et al. 1998
  (Eur. Phys. J. B 2, 5), optionally with their cone term, both differentiated numerically;
  ``F' = 1/2 C'' (V - V_cpd)^2``;
* short range: the full non-retarded Hamaker sphere-plane force (Hamaker 1937, Physica 4, 1058),
  differentiated numerically;
* finite amplitude: the Giessibl 2001 (Appl. Phys. Lett. 78, 123) weighting by quadrature for the mean parts
  and, for the exponential magnetic components, its closed form ``2 I1(qA)/(qA)``;
* phase: ``-arctan(Q F'/k)`` in degrees (driven damped oscillator), white noise, drift by Fourier shift; with
  ``drive_detuning_hz`` the steady-state lag of the oscillator with stiffness ``k - F'`` driven at
  ``f0 + detuning``, read against the free lever's (textbook, e.g. Garcia & Perez 2002, Surf. Sci. Rep. 47, 197;
  from memory).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import integrate, special

EPS0 = 8.8541878188e-12
MU0 = 1.25663706127e-6


def sphere_capacitance(z, radius):
    """Exact image-charge series of a sphere over a grounded plane (Smythe 1968) [F]."""
    z = np.atleast_1d(np.asarray(z, float))
    alpha = np.arccosh(1.0 + z / radius)
    out = np.empty_like(z)
    for i, a in enumerate(alpha):  # a handful of gaps; clarity over speed here
        n = np.arange(1, int(min(700.0 / a, 1e6)) + 1)
        out[i] = 4.0 * np.pi * EPS0 * radius * np.sinh(a) * np.sum(1.0 / np.sinh(n * a))
    return out


def second_derivative(fun, z, rel_step=2e-3):
    """Five-point central second difference."""
    z = np.asarray(z, float)
    hs = rel_step * z
    f = [fun(z + k * hs) for k in (-2, -1, 0, 1, 2)]
    return (-f[0] + 16 * f[1] - 30 * f[2] + 16 * f[3] - f[4]) / (12.0 * hs**2)


def first_derivative(fun, z, rel_step=2e-3):
    z = np.asarray(z, float)
    hs = rel_step * z
    return (fun(z - 2 * hs) - 8 * fun(z - hs) + 8 * fun(z + hs) - fun(z + 2 * hs)) / (12.0 * hs)


def cone_capacitance_gradient(z, radius, half_angle_deg, height):
    """dC/dz of the Hudlet et al. 1998 cone term: F_cone = 1/2 dC/dz V^2 with V = 1 [F/m]."""
    t = np.radians(half_angle_deg)
    u = z + radius * (1 - np.sin(t))
    force = -np.pi * EPS0 / np.log(np.tan(t / 2)) ** 2 * (
        np.log(height / u) - 1 + radius * np.cos(t) ** 2 / np.sin(t) / u)
    return 2.0 * force


def hudlet_apex_capacitance_gradient(z, radius, half_angle_deg):
    """dC/dz of the Hudlet et al. 1998 apex term, F_apex = -pi eps0 V^2 R^2 (1 - sin t) / (z (z + R (1 - sin t)))
    = 1/2 dC/dz V^2 with V = 1 [F/m] (formula from memory)."""
    a = radius * (1.0 - np.sin(np.radians(half_angle_deg)))
    return 2.0 * (-np.pi * EPS0 * radius * a / (z * (z + a)))


def vdw_force(z, hamaker, radius):
    return -2.0 * hamaker * radius**3 / (3.0 * z**2 * (z + 2 * radius) ** 2)


def giessibl_average(grad, centre, amplitude):
    """<F'>(d_c) = (2/pi) int_0^pi F'(d_c + A cos t) sin^2 t dt (Giessibl 2001)."""
    val, _ = integrate.quad(lambda t: float(grad(centre + amplitude * np.cos(t))) * np.sin(t) ** 2, 0.0, np.pi,
                            epsabs=0.0, epsrel=1e-11, limit=200)
    return 2.0 / np.pi * val


def random_domains(rows, cols, pixel, period, rng):
    """+-1 domains: the sign of a band-limited random field with its power near 1/period."""
    fr = np.fft.fftfreq(rows, d=pixel)[:, None]
    fc = np.fft.fftfreq(cols, d=pixel)[None, :]
    f = np.hypot(fr, fc)
    spec = np.exp(-0.5 * ((f - 1.0 / period) / (0.35 / period)) ** 2)
    field_ = np.fft.ifft2(np.fft.fft2(rng.normal(size=(rows, cols))) * spec).real
    return np.where(field_ >= 0, 1.0, -1.0)


def shift_image(img, drow, dcol):
    """Content moved by (drow, dcol) px, periodic (Fourier shift theorem), real result."""
    rows, cols = img.shape
    fr = np.fft.fftfreq(rows)[:, None]
    fc = np.fft.fftfreq(cols)[None, :]
    out = np.fft.ifft2(np.fft.fft2(img) * np.exp(-2j * np.pi * (fr * drow + fc * dcol)))
    return out.real


@dataclass(frozen=True)
class SyntheticSeries:
    phase_deg: np.ndarray
    heights_m: np.ndarray
    pixel_m: float
    bias_v: np.ndarray | None
    repeat_phase_deg: np.ndarray | None
    analysis_kwargs: dict
    magnetic_phase_deg: np.ndarray        # (H, rows, cols) pure magnetic phase, undrifted
    magnetic_rms_deg: np.ndarray          # (H,)
    electrostatic_deg: np.ndarray         # (H,) or (H, B)
    short_range_deg: np.ndarray           # (H,)
    drift_px: np.ndarray                  # (H, 2) or (H, B, 2)
    cpd_v: float
    noise_deg: float
    changed_map: np.ndarray | None = None
    extras: dict = field(default_factory=dict)


def build_series(*, rows=128, cols=128, pixel_m=10e-9, heights_m=(20e-9, 30e-9, 40e-9, 60e-9, 80e-9, 100e-9),
                 domain_period_m=400e-9, film_thickness_m=20e-9, saturation_a_per_m=8e5, tip_moment_a_m2=1e-16,
                 tip_offset_m=30e-9, magnetic_scale=1.0, noise_deg=0.02, drift_px=None, bias_v=None,
                 applied_bias_v=0.0, cpd_v=0.35, hamaker_j=1e-19, tip_radius_m=30e-9, cone_half_angle_deg=15.0,
                 cone_height_m=10e-6, amplitude_m=10e-9, gap_offset_m=None, spring_constant_n_per_m=2.8,
                 quality_factor=200.0, resonance_hz=75e3, repeat=False, flip_disk=None, nan_fraction=0.0,
                 margin_px=0, apex="sphere", cpd_patch_v=0.0, cpd_patch_sigma_m=200e-9, drive_detuning_hz=0.0,
                 seed=0):
    """Build a synthetic series; ``drift_px`` (H, 2) or (H, B, 2) in the analysis convention.

    ``apex``: "sphere" (exact image series) or "hudlet" (the Hudlet et al. apex term, with their cone when
    ``cone_half_angle_deg`` is given; its half angle also enters the apex term, 0 without a cone).
    ``margin_px`` > 0 makes the scan a non-periodic window: the film, its field and the drift are computed
    on a periodic grid ``margin_px`` larger on every side and only the central ``rows x cols`` are kept
    (a real scan is a crop of an unbounded field). Every returned map and truth refers to that window.
    ``cpd_patch_v``: a Gaussian patch of contact potential (that height above ``cpd_v``, standard deviation
    ``cpd_patch_sigma_m``) at the centre; each pixel then sees ``1/2 C'' (V - V_cpd(x))^2``, and
    ``electrostatic_deg`` is the phase of the window's mean gradient.
    ``drive_detuning_hz``: the images as read with the drive that far from the resonance (the truths stay the
    on-resonance phases); ``extras["drive_phase_offset_deg"]`` is the free lever's phase from quadrature there.
    """
    m = int(margin_px)
    if m:
        win = (slice(m, m + rows), slice(m, m + cols))
        rows, cols = rows + 2 * m, cols + 2 * m
        if flip_disk is not None:
            flip_disk = (flip_disk[0] + m, flip_disk[1] + m, flip_disk[2])
    rng = np.random.default_rng(seed)
    h = np.asarray(heights_m, float)
    nh = h.size
    gap_off = amplitude_m if gap_offset_m is None else gap_offset_m
    centre = h + gap_off
    k, q_f = spring_constant_n_per_m, quality_factor

    def to_phase(g):
        return -np.degrees(np.arctan(q_f * np.asarray(g) / k))

    u = 1.0 + drive_detuning_hz / resonance_hz  # drive over resonance frequency
    free_lag = np.arctan2(u / q_f, 1.0 - u**2)

    def as_read(g):  # the phase the lock-in reads, against the free lever's
        if not drive_detuning_hz:
            return to_phase(g)
        return np.degrees(free_lag - np.arctan2(u / q_f, 1.0 - np.asarray(g) / k - u**2))

    # magnetic gradient per height
    mz = saturation_a_per_m * random_domains(rows, cols, pixel_m, domain_period_m, rng)

    def magnetic_gradient(mz_map):
        fr = np.fft.fftfreq(rows, d=pixel_m)[:, None]
        fc = np.fft.fftfreq(cols, d=pixel_m)[None, :]
        qq = 2 * np.pi * np.hypot(fr, fc)
        mq = np.fft.fft2(mz_map)
        mq[0, 0] = 0.0
        qa = qq * amplitude_m
        weight = np.where(qa > 0, 2.0 * special.i1(qa) / np.where(qa > 0, qa, 1.0), 1.0)
        out = []
        for d in centre:
            hz = 0.5 * np.exp(-qq * (d + tip_offset_m)) * (1 - np.exp(-qq * film_thickness_m)) * mq
            out.append(np.fft.ifft2(MU0 * tip_moment_a_m2 * qq**2 * hz * weight).real * magnetic_scale)
        return np.array(out)

    g_mag = magnetic_gradient(mz)
    # mean parts
    def c2(z):
        if apex == "hudlet":
            angle = 0.0 if cone_half_angle_deg is None else cone_half_angle_deg
            return first_derivative(lambda zz: hudlet_apex_capacitance_gradient(zz, tip_radius_m, angle), z)
        return second_derivative(lambda zz: sphere_capacitance(zz, tip_radius_m), z)

    def c2_total(z):
        z = np.atleast_1d(z)
        val = c2(z)
        if cone_half_angle_deg is not None:
            val = val + first_derivative(
                lambda zz: cone_capacitance_gradient(zz, tip_radius_m, cone_half_angle_deg, cone_height_m), z)
        return val

    es_shape = np.array([giessibl_average(lambda z: 0.5 * c2_total(z)[0], d, amplitude_m) for d in centre])
    vdw_grad = np.array([giessibl_average(
        lambda z: first_derivative(lambda zz: vdw_force(zz, hamaker_j, tip_radius_m), z), d, amplitude_m)
        for d in centre])
    if bias_v is None:
        volts = np.array([applied_bias_v], float)
    else:
        volts = np.asarray(bias_v, float)
    nb = volts.size
    g_es = es_shape[:, None] * (volts[None] - cpd_v) ** 2  # (H, B)
    if cpd_patch_v:
        rr, cc = np.indices((rows, cols))
        r2 = ((rr - (rows - 1) / 2) ** 2 + (cc - (cols - 1) / 2) ** 2) * pixel_m**2
        cpd_map = cpd_v + cpd_patch_v * np.exp(-0.5 * r2 / cpd_patch_sigma_m**2)
        g_es = es_shape[:, None, None, None] * (volts[None, :, None, None] - cpd_map) ** 2  # (H, B, rows, cols)
    if drift_px is None:
        drift = np.zeros((nh, nb, 2))
    else:
        drift = np.asarray(drift_px, float)
        if drift.ndim == 2:
            drift = np.repeat(drift[:, None, :], nb, axis=1)
    images = np.empty((nh, nb, rows, cols))
    for i in range(nh):
        for b in range(nb):
            g = g_mag[i] + g_es[i, b] + vdw_grad[i]
            clean = as_read(g)
            if np.any(drift[i, b] != 0):
                clean = shift_image(clean, *drift[i, b])
            images[i, b] = clean + rng.normal(scale=noise_deg, size=(rows, cols))
    if nan_fraction > 0:
        bad = rng.random(images.shape) < nan_fraction
        images[bad] = np.nan
    repeat_img = None
    changed = None
    clean_change = None
    if repeat:
        mz2 = mz.copy()
        if flip_disk is not None:
            r0, c0, rad = flip_disk
            rr, cc = np.mgrid[0:rows, 0:cols]
            disk = (rr - r0) ** 2 + (cc - c0) ** 2 <= rad**2
            mz2[disk] = -mz2[disk]
        g2 = magnetic_gradient(mz2)[0] + g_es[0, 0] + vdw_grad[0]
        clean2 = to_phase(g2)
        clean1 = to_phase(g_mag[0] + g_es[0, 0] + vdw_grad[0])
        clean_change = clean2 - clean1
        changed = np.abs(clean_change) > 5 * noise_deg
        if np.any(drift[0, 0] != 0):
            clean2 = shift_image(clean2, *drift[0, 0])
        repeat_img = clean2 + rng.normal(scale=noise_deg, size=(rows, cols))
    if m:
        images = images[..., win[0], win[1]]
        g_mag = g_mag[:, win[0], win[1]]
        if repeat:
            repeat_img, changed, clean_change = (a[win] for a in (repeat_img, changed, clean_change))
    mag_phase = to_phase(g_mag)
    kwargs = dict(spring_constant_n_per_m=k, quality_factor=q_f, resonance_hz=resonance_hz, tip_radius_m=tip_radius_m,
                  amplitude_m=amplitude_m, gap_offset_m=gap_off, cone_half_angle_deg=cone_half_angle_deg,
                  cone_height_m=cone_height_m)
    phase = images if bias_v is not None else images[:, 0]
    if g_es.ndim == 4:
        g_es = g_es[..., win[0], win[1]] if m else g_es
        g_es = g_es.mean(axis=(-2, -1))
    es_deg = to_phase(g_es) if bias_v is not None else to_phase(g_es[:, 0])
    return SyntheticSeries(
        phase_deg=phase, heights_m=h, pixel_m=pixel_m, bias_v=None if bias_v is None else volts,
        repeat_phase_deg=repeat_img, analysis_kwargs=kwargs, magnetic_phase_deg=mag_phase,
        magnetic_rms_deg=np.sqrt(np.mean(mag_phase**2, axis=(1, 2))), electrostatic_deg=es_deg,
        short_range_deg=to_phase(vdw_grad), drift_px=drift if bias_v is not None else drift[:, 0],
        cpd_v=cpd_v, noise_deg=noise_deg, changed_map=changed,
        extras={"clean_change_deg": clean_change, "es_gradient": g_es, "vdw_gradient": vdw_grad,
                "magnetic_gradient": g_mag, "drive_phase_offset_deg": 90.0 - np.degrees(free_lag)})
