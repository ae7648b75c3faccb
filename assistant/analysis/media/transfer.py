"""The image of one recorded transition along a track, per spatial frequency.

A transition from -Ms to +Ms with the Williams-Comstock arctan profile M(x) = (2 Ms / pi) arctan((x - x0) / a)
(Williams & Comstock 1971, AIP Conf. Proc. 5, 738; from memory) has dM/dx = 2 Ms (a / pi) / ((x - x0)^2 + a^2),
whose transform is 2 Ms exp(-|k| a), so M(k) = 2 Ms exp(-|k| a) / (i k). In the charge formulation
(Hug et al. 1998, J. Appl. Phys. 83, 5609; Wallace 1951, Bell Syst. Tech. J. 30, 1145; both from memory) the
field at height z above a track much wider than z is, per component along the track (k_y = 0),

    out-of-plane (M_z):  H_z(k) = 1/2 exp(-k z) (1 - exp(-k t)) M(k)
                                = Ms exp(-k (z + a)) (1 - exp(-k t)) / (i k)
    in-plane (M_x):      H_z(k) = 1/2 exp(-k z) (1 - exp(-k t)) (-i sign k) M(k)
                                = -Ms exp(-k (z + a)) (1 - exp(-k t)) / k

with k = |k_x|. The force gradient is the tip transfer function times H_z (Hug et al. 1998; a point probe:
TTF = mu0 (m k^2 - q k) exp(-k delta), Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53, from memory), and the phase
is its negative times Q / k_c. The spacing z and the arctan parameter a enter only as z + a (and a point probe's
delta as well): the image gives w = z + a (+ delta); the lift height and a tip model take the rest off.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..quantitative import point_probe_ttf
from .errors import MediaInputError

__all__ = ["point_probe_transfer", "transition_response", "track_transition_response", "TrackResponse"]

def point_probe_transfer(*, dipole_a_m2: float = 1e-16, monopole_a_m: float = 0.0,
                         offset_m: float = 0.0) -> Callable[[np.ndarray], np.ndarray]:
    """Tip transfer function of a point probe, TTF(k) = mu0 (m k^2 - q k) exp(-k delta) [N/m per A/m], as a
    function of ``k`` in rad/m (either sign): the quantitative family's :func:`point_probe_ttf`, whose sign
    convention it shares (a tip moment along +z, the apex pole opposite: q < 0 when m > 0, so both terms add).
    """
    m, q, d = float(dipole_a_m2), float(monopole_a_m), float(offset_m)

    def ttf(k: np.ndarray) -> np.ndarray:
        return point_probe_ttf(np.abs(np.asarray(k, float)), moment_a_m2=m, monopole_a_m=q, offset_m=d)
    return ttf


def transition_response(k: np.ndarray, *, orientation: str, width_m: float, thickness_m: float | None,
                        tip_transfer: Callable[[np.ndarray], np.ndarray] | None = None) -> np.ndarray:
    """Shape of the image of one -Ms -> +Ms transition per (signed) spatial frequency k [rad/m] (rfft layout).

    The overall scale (Ms, Q / k_c, the sign of the phase) is left to the caller; the k = 0 term is zero.
    ``width_m`` is w = z + a (plus the tip's offset when ``tip_transfer`` is the bare k^2 default);
    ``thickness_m`` None means a film thick against 1/k (factor 1). ``tip_transfer`` defaults to a point dipole
    at the apex (k^2).
    """
    k = np.asarray(k, float)
    ka = np.abs(k)
    safe = np.where(ka > 0, ka, 1.0)
    tip = ka * ka if tip_transfer is None else np.asarray(tip_transfer(ka), float)
    thick = 1.0 if thickness_m is None else -np.expm1(-ka * float(thickness_m))
    common = tip * thick * np.exp(-ka * float(width_m))
    if orientation == "out-of-plane":
        out = common / (1j * np.where(k != 0, k, 1.0))
    elif orientation == "in-plane":
        out = -common / safe + 0j
    else:
        raise MediaInputError(f"orientation must be 'in-plane' or 'out-of-plane', got {orientation!r}")
    return np.where(ka > 0, out, 0.0)


def track_transition_response(kx: np.ndarray, *, orientation: str, width_m: float, thickness_m: float | None,
                              track_width_m: float, core_half_m: float, along_m: float = 0.0,
                              tip_transfer: Callable[[np.ndarray], np.ndarray] | None = None,
                              derivatives: bool = False):
    """The same for a track of finite width: the mean over the core rows |y| <= ``core_half_m`` of the field of a
    transition across a track ``track_width_m`` wide (the half-strip x > x0, |y| < W/2 changes by 2 Ms).

    In two dimensions H_z(kx, ky) = 1/2 exp(-k z) (1 - exp(-k t)) Phi M(kx, ky), k = |(kx, ky)|, Phi = 1 for
    M_z and -i kx / k for M_x along the track, M(kx, ky) = 2 Ms exp(-|kx| a) / (i kx) * 2 sin(ky W / 2) / ky:
    the arctan transition smooths along the track only, the spacing loss in every direction. With w = z + a
    (``width_m``) and a (``along_m``) the exponent is -k (w - a) - |kx| a (the analysis holds a: a profile
    barely tells it from the spacing, so its w carries both). The mean over the core multiplies by
    sin(ky c) / (ky c), and the profile is the integral over ky / 2 pi (midpoint rule on a grid fine against
    1 / W). For W -> infinity it is :func:`transition_response`. Out-of-plane, a narrow track shows more than its
    transitions: the two long edges where the data meet the erased band carry charge wherever a bit differs from
    the band, so the field over a bit depends on its polarity. With ``derivatives`` also returns d/dw, d/dt and
    d/da of the profile.
    """
    kx = np.asarray(kx, float)
    w, wd, a = float(width_m), float(track_width_m), float(along_m)
    c = float(min(core_half_m, 0.5 * wd))
    reach = 25.0 / max(w - a, 0.3 * w, 1e-300)  # exp(-k z) < 1.4e-11 beyond
    dky = min(np.pi / (2.0 * wd), reach / 64.0)  # midpoint rule: 0.2 % of the peak against a 4x finer grid
    ky = (np.arange(int(np.ceil(reach / dky))) + 0.5) * dky  # even in ky: half the line, doubled
    strip = 2.0 * np.sin(0.5 * ky * wd) / ky * np.sinc(ky * c / np.pi)
    k = np.hypot(kx[:, None], ky[None, :])
    akx = np.abs(kx)[:, None]
    tip = k * k if tip_transfer is None else np.asarray(tip_transfer(k), float)
    thick = 1.0 if thickness_m is None else -np.expm1(-k * float(thickness_m))
    body = tip * thick * np.exp(-k * (w - a) - akx * a) * strip[None, :]
    if orientation == "in-plane":
        body = body * akx / np.where(k > 0, k, 1.0)
        step = -1.0 / np.where(kx != 0, np.abs(kx), 1.0) + 0j   # -i sign(kx) / (i kx) = -1 / |kx|
    elif orientation == "out-of-plane":
        step = 1.0 / (1j * np.where(kx != 0, kx, 1.0))
    else:
        raise MediaInputError(f"orientation must be 'in-plane' or 'out-of-plane', got {orientation!r}")
    scale = 2.0 * dky / (2.0 * np.pi) * step * (kx != 0)
    g = body.sum(axis=1) * scale
    if not derivatives:
        return g
    g_w = (-k * body).sum(axis=1) * scale
    g_a = ((k - akx) * body).sum(axis=1) * scale
    if thickness_m is None:
        return g, g_w, np.zeros_like(g), g_a
    kt = k * float(thickness_m)
    dlog = np.where(kt > 0, k * np.exp(-kt) / -np.expm1(-np.where(kt > 0, kt, 1.0)), 0.0)
    g_t = (dlog * body).sum(axis=1) * scale
    return g, g_w, g_t, g_a


class TrackResponse:
    """:func:`track_transition_response` on a fixed frequency grid, for repeated calls with changing w and t (a
    fit): everything that does not depend on w and t (k, the tip, the strip and core factors, the step) is
    computed once. The ky grid reaches 25 / (``w_min`` - a); a smaller w loses a tail below exp(-25 w / w_min)
    (4e-6 at half of it)."""

    def __init__(self, kx: np.ndarray, *, orientation: str, track_width_m: float, core_half_m: float,
                 w_min: float, along_m: float = 0.0,
                 tip_transfer: Callable[[np.ndarray], np.ndarray] | None = None):
        kx = np.asarray(kx, float)
        wd, a = float(track_width_m), float(along_m)
        c = float(min(core_half_m, 0.5 * wd))
        reach = 25.0 / max(float(w_min) - a, 0.3 * float(w_min), 1e-300)
        dky = min(np.pi / (2.0 * wd), reach / 64.0)
        ky = (np.arange(int(np.ceil(reach / dky))) + 0.5) * dky
        strip = 2.0 * np.sin(0.5 * ky * wd) / ky * np.sinc(ky * c / np.pi)
        self.k = np.hypot(kx[:, None], ky[None, :])
        akx = np.abs(kx)[:, None]
        tip = self.k * self.k if tip_transfer is None else np.asarray(tip_transfer(self.k), float)
        base = tip * strip[None, :] * np.exp(-akx * a + self.k * a)  # the along-track share of w
        if orientation == "in-plane":
            base = base * akx / np.where(self.k > 0, self.k, 1.0)
            step = -1.0 / np.where(kx != 0, np.abs(kx), 1.0) + 0j
        elif orientation == "out-of-plane":
            step = 1.0 / (1j * np.where(kx != 0, kx, 1.0))
        else:
            raise MediaInputError(f"orientation must be 'in-plane' or 'out-of-plane', got {orientation!r}")
        self.base = base
        self.scale = 2.0 * dky / (2.0 * np.pi) * step * (kx != 0)

    def __call__(self, width_m: float, thickness_m: float | None, derivatives: bool = False):
        e = np.exp(-self.k * float(width_m))
        if thickness_m is None:
            body = self.base * e
        else:
            one_minus = -np.expm1(-self.k * float(thickness_m))
            body = self.base * e * one_minus
        g = body.sum(axis=1) * self.scale
        if not derivatives:
            return g
        g_w = (-self.k * body).sum(axis=1) * self.scale
        if thickness_m is None:
            return g, g_w, np.zeros_like(g)
        g_t = (self.base * e * self.k * (1.0 - one_minus)).sum(axis=1) * self.scale
        return g, g_w, g_t
