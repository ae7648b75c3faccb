"""A small simulated stage for the procedure tests: the default scenario on a 2 µm film of 20 nm pixels, so
that a whole session (calibration, approach, a series, its analysis) takes well under a second."""

from __future__ import annotations

from importlib import resources

from assistant.procedures.calibrate import CalibrationSettings
from assistant.procedures.series import SeriesSettings
from drivers.registry import open_controller
from simulated_stage.scenario import Scenario

DEFAULT = resources.files("simulated_stage").joinpath("scenarios/default.toml").read_text()

#: A short thermal record and a coarse sweep: enough for the drive, not for an accurate k.
QUICK_CALIBRATION = CalibrationSettings(thermal_seconds=0.1, thermal_rate_hz=5e5, sweep_points=41)
QUICK_SERIES = SeriesSettings(heights_m=(10e-9, 20e-9, 40e-9), lines=8, pixels=16, scan_size_m=1e-6)


def small_scenario(extra: str = "") -> Scenario:
    text = DEFAULT.replace("extent_um = 12.0", "extent_um = 2.0").replace("pixel_nm = 10.0", "pixel_nm = 20.0")
    return Scenario.from_text(text + extra)


def open_small(seed: int = 0, *, extra: str = "", **options):
    """The simulated controller over the small stage."""
    return open_controller("sim://", scenario=small_scenario(extra), seed=seed, **options)
