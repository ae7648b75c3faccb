"""The probe tip seen by the sample: apex sphere and cone, and a magnetic point probe.

The magnetic coating is replaced by an effective point dipole ``m`` (z-oriented) and/or monopole ``q`` sitting
``effective_distance`` behind the apex (point-probe model, Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53).
This module also holds the small validation helpers shared by the scenario tables of the tip and the sample.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from simulated_stage.errors import ScenarioError


def check_range(section: str, key: str, value: Any, low: float, high: float, *, low_open: bool = False) -> None:
    """Raise ScenarioError unless ``low <= value <= high`` (``low < value`` when ``low_open``)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ScenarioError(f"[{section}] {key} = {value!r} must be a finite number in "
                            f"{'(' if low_open else '['}{low:g}, {high:g}]")
    bad_low = value <= low if low_open else value < low
    if bad_low or value > high:
        raise ScenarioError(f"[{section}] {key} = {value:g} is outside the allowed range "
                            f"{'(' if low_open else '['}{low:g}, {high:g}]")


def spec_from_table(cls: type, table: Mapping[str, Any], section: str) -> Any:
    """Build the frozen dataclass ``cls`` from a scenario table, rejecting unknown keys by name."""
    if not isinstance(table, Mapping):
        raise ScenarioError(f"[{section}] must be a table, got {type(table).__name__}")
    known = {f.name: f for f in dataclasses.fields(cls)}
    for key in table:
        if key not in known:
            raise ScenarioError(f"[{section}] unknown key {key!r}; allowed keys: {', '.join(sorted(known))}")
    values = {}
    for key, value in table.items():
        default = known[key].default
        # TOML gives ints where floats are meant ("period_nm = 400"); accept them, refuse other types.
        if isinstance(default, float) and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if type(default) is not type(value):
            raise ScenarioError(f"[{section}] {key} = {value!r} must be of type {type(default).__name__}")
        values[key] = value
    return cls(**values)


@dataclass(frozen=True)
class TipSpec:
    """Tip geometry and magnetic point-probe parameters (scenario table ``[tip]``)."""

    radius_nm: float = 30.0
    cone_half_angle_deg: float = 15.0
    cone_height_um: float = 10.0
    moment_a_m2: float = 1e-16
    monopole_a_m: float = 0.0
    effective_distance_nm: float = 30.0
    youngs_modulus_gpa: float = 169.0
    coercive_field_ka_per_m: float = 300.0  # the coating's moment reverses when an applied field opposes it more


    def __post_init__(self) -> None:
        s = "tip"
        check_range(s, "radius_nm", self.radius_nm, 0.5, 5000.0)
        check_range(s, "cone_half_angle_deg", self.cone_half_angle_deg, 1.0, 60.0)
        check_range(s, "cone_height_um", self.cone_height_um, 0.1, 100.0)
        check_range(s, "moment_a_m2", self.moment_a_m2, -1e-12, 1e-12)
        check_range(s, "monopole_a_m", self.monopole_a_m, -1e-4, 1e-4)
        check_range(s, "effective_distance_nm", self.effective_distance_nm, 0.0, 2000.0)
        check_range(s, "youngs_modulus_gpa", self.youngs_modulus_gpa, 0.1, 2000.0, low_open=True)
        check_range(s, "coercive_field_ka_per_m", self.coercive_field_ka_per_m, 0.0, 1e5, low_open=True)

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> "TipSpec":
        """Build from a scenario ``[tip]`` table; unknown keys raise ScenarioError naming the key."""
        return spec_from_table(cls, table, "tip")

    # SI views used by the physics modules
    @property
    def radius_m(self) -> float:
        return self.radius_nm * 1e-9

    @property
    def cone_half_angle_rad(self) -> float:
        return math.radians(self.cone_half_angle_deg)

    @property
    def cone_height_m(self) -> float:
        return self.cone_height_um * 1e-6

    @property
    def effective_distance_m(self) -> float:
        return self.effective_distance_nm * 1e-9

    @property
    def youngs_modulus_pa(self) -> float:
        return self.youngs_modulus_gpa * 1e9


def point_probe_field(dx_m: np.ndarray, dy_m: np.ndarray, height_m: np.ndarray, *,
                      moment_a_m2: float, monopole_a_m: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Field (H_x, H_y, H_z) [A/m] of the point probe at points below it.

    Parameters
    ----------
    dx_m, dy_m : lateral offset of the field point from the probe [m].
    height_m : height of the probe above the field point [m], > 0.
    moment_a_m2, monopole_a_m : z-dipole m [A m^2] and monopole q [A m].

    Notes
    -----
    H = (3 r_hat (m . r_hat) - m) / (4 pi r^3) + q r_hat / (4 pi r^2), r from the probe to the field point
    (textbook magnetostatics, e.g. Jackson, Classical Electrodynamics, 3rd ed., eq. 5.56; from memory).
    """
    rx, ry, rz = np.asarray(dx_m, float), np.asarray(dy_m, float), -np.asarray(height_m, float)
    r2 = rx * rx + ry * ry + rz * rz
    r = np.sqrt(r2)
    inv_r3 = 1.0 / (r2 * r)
    m_dot_r = moment_a_m2 * rz
    dip = 1.0 / (4.0 * np.pi) * inv_r3
    hx = dip * (3.0 * rx * m_dot_r / r2) + monopole_a_m / (4.0 * np.pi) * rx * inv_r3
    hy = dip * (3.0 * ry * m_dot_r / r2) + monopole_a_m / (4.0 * np.pi) * ry * inv_r3
    hz = dip * (3.0 * rz * m_dot_r / r2 - moment_a_m2) + monopole_a_m / (4.0 * np.pi) * rz * inv_r3
    return hx, hy, hz


def field_reach_m(moment_a_m2: float, monopole_a_m: float, field_a_per_m: float) -> float:
    """Distance beyond which the probe's field magnitude is surely below ``field_a_per_m`` [m].

    Uses |H_dipole| <= 2|m|/(4 pi r^3) and |H_monopole| = |q|/(4 pi r^2); each bound is solved for half the
    field so that their sum stays below it.
    """
    reach = 0.0
    if moment_a_m2:
        reach = max(reach, (2.0 * abs(moment_a_m2) / (4.0 * np.pi * 0.5 * field_a_per_m)) ** (1.0 / 3.0))
    if monopole_a_m:
        reach = max(reach, math.sqrt(abs(monopole_a_m) / (4.0 * np.pi * 0.5 * field_a_per_m)))
    return reach
