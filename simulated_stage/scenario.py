"""Scenarios: a TOML file that says which probe, environment, instrument, sample and tip to simulate.

Tables: ``[probe]``, ``[environment]``, ``[instrument]`` (validated here), ``[sample]`` and ``[tip]`` (validated by
the sample physics), ``[faults]`` (kept raw for the fault injector). Top-level keys ``name`` and
``description`` are free text. Unknown tables or keys and values outside their allowed range raise
:class:`ScenarioError` naming the key and the range. Built-in scenarios live in ``simulated_stage/scenarios``
and are opened by name.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
import warnings
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from simulated_stage.clock import VirtualClock
from simulated_stage.errors import ScenarioError
from simulated_stage.instrument import InstrumentConfig, StageLimits, VirtualMicroscope
from simulated_stage.lever import MATERIALS, Lever, air, build_lever
from simulated_stage.optical_lever import OpticalLever
from simulated_stage.sample import SampleSpec, build_sample
from simulated_stage.tip import TipSpec


class LeverWarning(UserWarning):
    """The scenario's lever disagrees with the Sader theory by more than its accuracy."""


def _field(default: Any, low: float | None = None, high: float | None = None, *, choices: tuple = ()) -> Any:
    return dataclasses.field(default=default, metadata={"range": (low, high), "choices": choices})


@dataclass(frozen=True)
class ProbeSpec:
    """``[probe]``: k, f0 and Q override what the geometry gives; see :func:`simulated_stage.lever.build_lever`."""

    spring_constant_n_per_m: float | None = _field(None, 1e-3, 1e3)
    resonance_hz: float | None = _field(None, 1e3, 5e6)
    quality_factor: float | None = _field(None, 1.0, 1e5)
    invols_nm_per_v: float = _field(50.0, 1.0, 1000.0)
    length_um: float = _field(225.0, 10.0, 2000.0)
    width_um: float | None = _field(None, 2.0, 500.0)  # derived from k, f0, Q if all given, else 28 um
    thickness_um: float | None = _field(None, 0.1, 50.0)  # 3 um when the geometry has to give k, f0 or Q
    material: str = _field("silicon", choices=tuple(sorted(MATERIALS)))
    drive_nm_per_v: float = _field(100.0, 0.1, 1e4)  # free peak amplitude at resonance per drive volt


@dataclass(frozen=True)
class EnvironmentSpec:
    """``[environment]``: dry air around the lever."""

    temperature_k: float = _field(298.15, 200.0, 400.0)
    pressure_pa: float = _field(101_325.0, 1e3, 2e5)  # below a few kPa the continuum (Sader) picture fails


@dataclass(frozen=True)
class InstrumentSpec:
    """``[instrument]``: positioners, detector, drive, lock-in and feedback, in the trade's units."""

    z_range_um: float = _field(10.0, 0.5, 100.0)
    z_speed_um_per_s: float = _field(20.0, 0.01, 1000.0)
    z_sensor_noise_nm: float = _field(0.05, 0.0, 10.0)
    coarse_step_nm: float = _field(50.0, 1.0, 1e4)
    coarse_step_scatter: float = _field(0.1, 0.0, 0.5)
    coarse_travel_mm: float = _field(2.0, 0.01, 50.0)
    start_gap_um: float = _field(40.0, 1.0, 5000.0)
    scan_size_max_um: float = _field(90.0, 1.0, 500.0)
    xy_speed_um_per_s: float = _field(100.0, 0.1, 1e4)
    drift_x_nm_per_s: float = _field(0.0, -100.0, 100.0)
    drift_y_nm_per_s: float = _field(0.0, -100.0, 100.0)
    bias_max_v: float = _field(10.0, 0.0, 100.0)
    drive_max_v: float = _field(2.0, 1e-3, 100.0)
    sample_rate_max_hz: float = _field(5e6, 1e3, 1e8)
    frequency_max_hz: float = _field(2e6, 1e3, 1e8)
    phase_offset_deg: float = _field(0.0, -180.0, 180.0)
    lockin_time_constant_ms: float = _field(0.1, 1e-3, 1e4)
    p_gain: float = _field(0.2, 0.0, 10.0)
    i_gain_per_s: float = _field(1500.0, 1.0, 1e7)
    servo_oversample: int = _field(4, 1, 64)
    tapping_sharpness: float = _field(6.0, 2.0, 50.0)
    crash_depth_nm: float = _field(20.0, 0.0, 1000.0)
    detector_noise_uv_per_rthz: float = _field(2.0, 0.0, 1000.0)
    flicker_uv_per_rthz_at_1hz: float = _field(20.0, 0.0, 1e4)
    sum_v: float = _field(4.0, 0.1, 20.0)
    sum_min_v: float = _field(0.5, 0.0, 20.0)
    saturation_v: float = _field(10.0, 0.1, 100.0)
    magnet_max_ka_per_m: float = _field(800.0, 0.0, 1e4)  # 0: no magnet under the sample
    magnet_ramp_ka_per_m_per_s: float = _field(50.0, 0.01, 1e4)
    magnet_settle_s: float = _field(2.0, 0.0, 600.0)
    magnet_noise_ka_per_m: float = _field(0.05, 0.0, 100.0)


def _spec(cls: type, table: Any, section: str) -> Any:
    if not isinstance(table, Mapping):
        raise ScenarioError(f"[{section}] must be a table, got {type(table).__name__}")
    fields = {f.name: f for f in dataclasses.fields(cls)}
    values: dict[str, Any] = {}
    for key, value in table.items():
        if key not in fields:
            raise ScenarioError(f"[{section}] unknown key {key!r}; allowed keys: {', '.join(fields)}")
        f = fields[key]
        low, high = f.metadata["range"]
        choices = f.metadata["choices"]
        if choices:
            if value not in choices:
                raise ScenarioError(f"[{section}] {key} = {value!r} must be one of {', '.join(choices)}")
        elif isinstance(f.default, int) and not isinstance(f.default, bool):
            if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
                raise ScenarioError(f"[{section}] {key} = {value!r} must be an integer in [{low:g}, {high:g}]")
        else:
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise ScenarioError(f"[{section}] {key} = {value!r} must be a number in [{low:g}, {high:g}]")
            value = float(value)
            if not (math.isfinite(value) and low <= value <= high):
                raise ScenarioError(f"[{section}] {key} = {value:g} is outside the allowed range [{low:g}, {high:g}]")
        values[key] = value
    return cls(**values)


_TABLES = ("probe", "environment", "instrument", "sample", "tip", "faults")


@dataclass(frozen=True)
class Scenario:
    """A validated scenario. ``text`` is the TOML it came from (stored in session files)."""

    name: str
    description: str
    text: str
    source: str
    probe: ProbeSpec
    environment: EnvironmentSpec
    instrument: InstrumentSpec
    sample: SampleSpec
    tip: TipSpec
    faults: Any = None  # the raw [faults] table, not interpreted here

    @classmethod
    def from_text(cls, text: str, *, name: str = "custom", source: str = "<text>") -> "Scenario":
        try:
            doc = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ScenarioError(f"scenario {source}: not valid TOML: {exc}") from None
        for key, value in doc.items():
            if key in ("name", "description"):
                if not isinstance(value, str):
                    raise ScenarioError(f"scenario key {key!r} must be a string")
            elif key not in _TABLES:
                raise ScenarioError(f"unknown scenario table or key {key!r}; allowed: name, description, "
                                    f"{', '.join('[' + t + ']' for t in _TABLES)}")
        scenario = cls(
            name=doc.get("name", name), description=doc.get("description", ""), text=text, source=source,
            probe=_spec(ProbeSpec, doc.get("probe", {}), "probe"),
            environment=_spec(EnvironmentSpec, doc.get("environment", {}), "environment"),
            instrument=_spec(InstrumentSpec, doc.get("instrument", {}), "instrument"),
            sample=SampleSpec.from_table(doc.get("sample", {})),
            tip=TipSpec.from_table(doc.get("tip", {})),
            faults=doc.get("faults"),
        )
        scenario.lever()  # validate the probe as a whole (e.g. a width that cannot exist)
        i = scenario.instrument
        if i.start_gap_um / 1e3 >= i.coarse_travel_mm:
            raise ScenarioError(f"[instrument] start_gap_um = {i.start_gap_um:g} must be below the coarse travel "
                                f"({i.coarse_travel_mm * 1e3:g} um) or the surface can never be reached")
        return scenario

    def lever(self) -> Lever:
        """The lever of this scenario in its air (warnings in ``Lever.warnings``)."""
        p, env = self.probe, self.environment
        overridden = None not in (p.spring_constant_n_per_m, p.resonance_hz, p.quality_factor)
        # without all of k, f0 and Q the geometry decides; missing parts default to a 28 x 3 um silicon beam
        width_um = p.width_um if (p.width_um is not None or overridden) else 28.0
        thickness_um = p.thickness_um if (p.thickness_um is not None or overridden) else 3.0
        try:
            return build_lever(
                length_m=p.length_um / 1e6, fluid=air(env.temperature_k, env.pressure_pa),
                width_m=None if width_um is None else width_um / 1e6,
                thickness_m=None if thickness_um is None else thickness_um / 1e6,
                material=p.material, spring_constant_n_per_m=p.spring_constant_n_per_m,
                resonance_hz=p.resonance_hz, quality_factor=p.quality_factor)
        except ValueError as exc:
            raise ScenarioError(f"[probe] {exc}") from None

    def instrument_config(self) -> InstrumentConfig:
        i, p = self.instrument, self.probe
        limits = StageLimits(
            z_range_m=i.z_range_um / 1e6, z_speed_max_m_per_s=i.z_speed_um_per_s / 1e6, bias_max_v=i.bias_max_v,
            drive_max_v=i.drive_max_v, coarse_travel_max_m=i.coarse_travel_mm / 1e3,
            coarse_step_m=i.coarse_step_nm / 1e9, scan_size_max_m=i.scan_size_max_um / 1e6,
            sample_rate_max_hz=i.sample_rate_max_hz, frequency_max_hz=i.frequency_max_hz,
            field_max_a_per_m=i.magnet_max_ka_per_m * 1e3, field_ramp_a_per_m_per_s=i.magnet_ramp_ka_per_m_per_s * 1e3,
            field_settle_s=i.magnet_settle_s)
        detector = OpticalLever(invols_m_per_v=p.invols_nm_per_v / 1e9,
                                white_noise_v_per_rthz=i.detector_noise_uv_per_rthz / 1e6,
                                flicker_v_per_rthz_at_1hz=i.flicker_uv_per_rthz_at_1hz / 1e6,
                                sum_v=i.sum_v, saturation_v=i.saturation_v)
        return InstrumentConfig(
            limits=limits, z_sensor_noise_m=i.z_sensor_noise_nm / 1e9, coarse_step_scatter=i.coarse_step_scatter,
            start_gap_m=i.start_gap_um / 1e6, drift_m_per_s=(i.drift_x_nm_per_s / 1e9, i.drift_y_nm_per_s / 1e9),
            xy_speed_m_per_s=i.xy_speed_um_per_s / 1e6, drive_m_per_v=p.drive_nm_per_v / 1e9,
            phase_offset_deg=i.phase_offset_deg, lockin_time_constant_s=i.lockin_time_constant_ms / 1e3,
            p_gain=i.p_gain, i_gain_per_s=i.i_gain_per_s, servo_oversample=i.servo_oversample,
            tapping_sharpness=i.tapping_sharpness, crash_depth_m=i.crash_depth_nm / 1e9, sum_min_v=i.sum_min_v,
            detector=detector, field_noise_a_per_m=i.magnet_noise_ka_per_m * 1e3)


def builtin_scenarios() -> tuple[str, ...]:
    """Names of the scenarios that ship with the stage."""
    folder = resources.files("simulated_stage") / "scenarios"
    return tuple(sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".toml")))


def load_scenario(name_or_path: str | Path = "default") -> Scenario:
    """A built-in scenario by name, or a TOML file by path."""
    key = str(name_or_path)
    if key in builtin_scenarios():
        text = (resources.files("simulated_stage") / "scenarios" / f"{key}.toml").read_text(encoding="utf-8")
        return Scenario.from_text(text, name=key, source=f"built-in:{key}")
    path = Path(key)
    if not path.is_file():
        raise ScenarioError(f"scenario {key!r} is neither a built-in ({', '.join(builtin_scenarios())}) "
                            f"nor a readable file")
    return Scenario.from_text(path.read_text(encoding="utf-8"), name=path.stem, source=str(path))


def build_microscope(scenario: Scenario, *, seed: int = 0, clock: VirtualClock | None = None,
                     sample: Any = None) -> VirtualMicroscope:
    """The virtual microscope of a scenario; ``sample`` replaces the scenario's sample (tests)."""
    lever = scenario.lever()
    for message in lever.warnings:
        warnings.warn(f"scenario {scenario.name}: {message}", LeverWarning, stacklevel=2)
    if sample is None:
        sample = build_sample(scenario.sample, scenario.tip)
    return VirtualMicroscope(lever=lever, sample=sample, temperature_k=scenario.environment.temperature_k,
                             config=scenario.instrument_config(), rng=np.random.default_rng(seed),
                             clock=clock or VirtualClock("fast"))
