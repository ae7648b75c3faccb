"""Electrostatic tip-sample force: exact sphere-plane capacitance plus the cone term of Hudlet et al.

F = 1/2 C'(z) (V - V_cpd)^2 and F' = 1/2 C''(z) (V - V_cpd)^2 (textbook; e.g. Hudlet, Saint Jean, Guthmann &
Berger 1998, Eur. Phys. J. B 2, 5). The apex is the exact image-charge series of a sphere (radius R) above a
grounded plane, cosh(alpha) = 1 + z/R, C = 4 pi eps0 R sinh(alpha) sum_n 1/sinh(n alpha) (Smythe, Static and
Dynamic Electricity, 3rd ed. 1968; written from memory, checked against an independent mpmath evaluation in the
tests). The cone (half-angle theta0, height H) is Hudlet's truncated-cone term. z is the gap between the apex
and the sample surface [m]; C' < 0 (attraction).
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import CubicSpline

EPSILON_0 = 8.8541878188e-12  # F/m, CODATA 2022
_TERMS_EXPONENT = 40.0  # stop the series once exp(-n alpha) < exp(-40): below double precision
_MAX_TERMS = 20000


def _series(z_m: np.ndarray, radius_m: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """C, dC/dz, d2C/dz2 of the sphere for gaps z > 0 (arrays of the shape of z)."""
    z = np.atleast_1d(np.asarray(z_m, float))
    u = z / radius_m
    alpha = np.log1p(u + np.sqrt(u * (2.0 + u)))  # arccosh(1 + u) without cancellation at small u
    c = np.empty_like(z)
    c1 = np.empty_like(z)
    c2 = np.empty_like(z)
    n_needed = np.minimum(np.ceil(_TERMS_EXPONENT / alpha), _MAX_TERMS).astype(int)
    # Group gaps by the number of terms they need so that small gaps do not drag the rest along.
    order = np.argsort(n_needed)
    for chunk in np.array_split(order, max(1, min(len(order), 16))):
        if chunk.size == 0:
            continue
        a = alpha[chunk][:, None]
        n = np.arange(1, n_needed[chunk].max() + 1)[None, :]
        e = np.exp(-n * a)                     # exp(-n alpha), never overflows
        e2 = e * e
        csch_n = 2.0 * e / (1.0 - e2)          # 1/sinh(n alpha)
        coth_n = (1.0 + e2) / (1.0 - e2)       # coth(n alpha)
        sinh_a = np.sinh(a[:, 0])
        cosh_a = np.cosh(a[:, 0])
        coth_a = cosh_a / sinh_a
        s0 = csch_n.sum(axis=1)
        t = ((coth_a[:, None] - n * coth_n) * csch_n).sum(axis=1)
        # dT/dalpha, term by term
        dt = ((-1.0 / sinh_a[:, None] ** 2 + n**2 * csch_n**2) * csch_n
              - (coth_a[:, None] - n * coth_n) * n * coth_n * csch_n).sum(axis=1)
        c[chunk] = 4.0 * np.pi * EPSILON_0 * radius_m * sinh_a * s0
        c1[chunk] = 4.0 * np.pi * EPSILON_0 * t
        c2[chunk] = 4.0 * np.pi * EPSILON_0 * dt / (radius_m * sinh_a)  # dalpha/dz = 1/(R sinh alpha)
    shape = np.shape(z_m)
    return c.reshape(shape), c1.reshape(shape), c2.reshape(shape)


def sphere_capacitance(z_m: np.ndarray, radius_m: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact sphere-plane capacitance and its gap derivatives.

    Parameters
    ----------
    z_m : gap between the sphere and the plane [m], > 0.
    radius_m : sphere radius R [m].

    Returns
    -------
    C [F], dC/dz [F/m], d2C/dz2 [F/m^2].

    Notes
    -----
    Image-charge series (Smythe 1968, from memory): cosh a = 1 + z/R, C = 4 pi eps0 R sinh a sum 1/sinh(n a);
    dC/dz = 4 pi eps0 sum (coth a - n coth n a)/sinh(n a). Terms are summed until exp(-n a) < exp(-40).
    Small-gap limit dC/dz -> -2 pi eps0 R/z (proximity form).
    """
    return _series(z_m, radius_m)


def cone_capacitance_derivatives(z_m: np.ndarray, radius_m: float, half_angle_rad: float,
                                 height_m: float) -> tuple[np.ndarray, np.ndarray]:
    """dC/dz [F/m] and d2C/dz2 [F/m^2] of the cone of Hudlet et al. 1998 (Eur. Phys. J. B 2, 5).

    F_cone = -pi eps0 V^2 / ln(tan(theta0/2))^2 * { ln[H/(z + R(1 - sin theta0))] - 1
             + R cos^2(theta0)/sin(theta0) / (z + R(1 - sin theta0)) }   (formula written from memory),
    and dC/dz = 2 F/V^2.
    """
    z = np.asarray(z_m, float)
    s, c = np.sin(half_angle_rad), np.cos(half_angle_rad)
    pref = -np.pi * EPSILON_0 / np.log(np.tan(half_angle_rad / 2.0)) ** 2
    u = z + radius_m * (1.0 - s)
    b = radius_m * c * c / s
    bracket = np.log(height_m / u) - 1.0 + b / u
    # The formula holds for z << H; where the bracket turns negative (z ~ H/e) the cone no longer attracts
    # in this model, so its contribution is dropped there rather than allowed to repel.
    valid = bracket > 0.0
    f_per_v2 = np.where(valid, pref * bracket, 0.0)
    df_per_v2 = np.where(valid, pref * (-1.0 / u - b / u**2), 0.0)
    return 2.0 * f_per_v2, 2.0 * df_per_v2


def hudlet_apex_force(z_m: np.ndarray, radius_m: float, half_angle_rad: float, voltage_v: float
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Hudlet et al. 1998 apex term F [N] and dF/dz [N/m]; used only as a cross-check of the exact sphere.

    F_apex = -pi eps0 V^2 R^2 (1 - sin theta0) / (z [z + R(1 - sin theta0)]) (from memory).
    """
    z = np.asarray(z_m, float)
    r1 = radius_m * (1.0 - np.sin(half_angle_rad))
    pref = -np.pi * EPSILON_0 * voltage_v**2 * radius_m * r1
    return pref / (z * (z + r1)), -pref * (2.0 * z + r1) / (z * (z + r1)) ** 2


class TipCapacitance:
    """C'(z) and C''(z) of sphere plus cone, with the gap clamped at ``contact_gap_m`` (no closer approach).

    The exact sphere series is tabulated once on 3000 log-spaced gaps from the contact gap to 1 mm and
    interpolated with cubic splines of log|C'| and log C'' against log z (relative error below 1e-9,
    checked in the tests); gaps beyond the table use the series directly. The cone is a closed form.
    """

    _TABLE_TOP_M = 1e-3

    def __init__(self, *, radius_m: float, half_angle_rad: float, cone_height_m: float,
                 contact_gap_m: float = 0.165e-9) -> None:
        self.radius_m, self.half_angle_rad, self.cone_height_m = radius_m, half_angle_rad, cone_height_m
        self.contact_gap_m = contact_gap_m
        z = np.geomspace(contact_gap_m, self._TABLE_TOP_M, 3000)
        _, c1, c2 = sphere_capacitance(z, radius_m)
        self._log_c1 = CubicSpline(np.log(z), np.log(-c1))
        self._log_c2 = CubicSpline(np.log(z), np.log(c2))

    def exact_derivatives(self, z_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(dC/dz [F/m], d2C/dz2 [F/m^2]) of sphere + cone from the series, z >= contact gap."""
        _, c1, c2 = sphere_capacitance(z_m, self.radius_m)
        k1, k2 = cone_capacitance_derivatives(z_m, self.radius_m, self.half_angle_rad, self.cone_height_m)
        return c1 + k1, c2 + k2

    def derivatives(self, z_m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(dC/dz [F/m], d2C/dz2 [F/m^2]) at gaps z [m]; below the contact gap the force stays constant."""
        z_in = np.asarray(z_m, float)
        z = np.clip(z_in, self.contact_gap_m, self._TABLE_TOP_M)
        lz = np.log(z)
        c1 = -np.exp(self._log_c1(lz))
        c2 = np.exp(self._log_c2(lz))
        far = z_in > self._TABLE_TOP_M
        if np.any(far):
            _, c1_far, c2_far = sphere_capacitance(z_in[far], self.radius_m)
            c1[far], c2[far] = c1_far, c2_far
        k1, k2 = cone_capacitance_derivatives(np.maximum(z_in, self.contact_gap_m), self.radius_m,
                                              self.half_angle_rad, self.cone_height_m)
        c2 = np.where(z_in < self.contact_gap_m, 0.0, c2 + k2)
        return c1 + k1, c2

    def force_per_v2(self, z_m: np.ndarray) -> np.ndarray:
        """F/(V - V_cpd)^2 = C'/2 [N/V^2]."""
        return 0.5 * self.derivatives(z_m)[0]

    def gradient_per_v2(self, z_m: np.ndarray) -> np.ndarray:
        """F'/(V - V_cpd)^2 = C''/2 [N/(m V^2)]."""
        return 0.5 * self.derivatives(z_m)[1]
