"""simulated_stage: the physics of a virtual magnetic force microscope (imports nothing of the assistant).

The public names are re-exported lazily, so that importing one small module (``simulated_stage.errors``)
does not pull in scipy and the whole physics stack.
"""

from __future__ import annotations

import importlib

_EXPORTS = {
    "VirtualClock": "clock", "PACES": "clock",
    "Lever": "lever", "Fluid": "lever", "air": "lever", "build_lever": "lever",
    "gamma_circular": "lever", "gamma_rectangular": "lever", "sader_spring_constant": "lever",
    "ThermalMode": "thermal_mode",
    "OpticalLever": "optical_lever", "FlickerNoise": "optical_lever", "CHI": "optical_lever",
    "ZPiezo": "scanner", "CoarseMotor": "scanner", "XYScanner": "scanner",
    "VirtualMicroscope": "instrument", "InstrumentConfig": "instrument", "StageLimits": "instrument",
    "StageStatus": "results", "SweepResult": "results", "LineResult": "results",
    "PassResult": "results", "ForceCurveResult": "results", "driven_response": "lockin",
    "LockIn": "lockin", "AmplitudeFeedback": "feedback",
    "Scenario": "scenario", "ProbeSpec": "scenario", "EnvironmentSpec": "scenario", "InstrumentSpec": "scenario",
    "LeverWarning": "scenario", "load_scenario": "scenario", "builtin_scenarios": "scenario",
    "build_microscope": "scenario",
    "StageError": "errors", "ScenarioError": "errors", "StageLimitError": "errors", "StageFault": "errors",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'simulated_stage' has no attribute {name!r}")
    return getattr(importlib.import_module(f"simulated_stage.{module}"), name)
