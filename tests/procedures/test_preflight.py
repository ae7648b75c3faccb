"""Checks before the stage moves: settings that would fail later are refused first, with one line, exit 2; the
same function serves ``mfma run`` and the terminal UI."""

from __future__ import annotations

from dataclasses import replace

import pytest

from assistant.cli import main
from assistant.procedures.guard import SafetyLimits
from assistant.procedures.preflight import PlanError, check_series_plan, free_series_name
from assistant.procedures.series import SeriesSettings
from drivers.base import Capability, Limits

BASE = SeriesSettings(heights_m=(10e-9, 20e-9, 40e-9), lines=8, pixels=16)


class FakeController:
    """Only what the checks read: hard limits and capabilities."""

    def __init__(self, *, missing=(), **limits):
        self.limits = Limits(**limits)
        self.capabilities = frozenset(Capability) - set(missing)

    def has(self, capability):
        return capability in self.capabilities


def test_what_the_series_will_give():
    assert check_series_plan(BASE, limits=SafetyLimits()).analysis == "decomposition"
    one = check_series_plan(replace(BASE, heights_m=(30e-9,), biases_v=(-0.5, 0.0, 0.5)), limits=SafetyLimits())
    assert one.analysis == "imaging"
    assert "V_cpd from 3 biases" in one.sentence and "needs at least 3 heights" in one.sentence


@pytest.mark.parametrize("settings, controller, needle", [
    (replace(BASE, biases_v=(-7.0, 0.0, 1.0)), None, "software limit"),  # was a runtime error (exit 1)
    (replace(BASE, heights_m=(10e-9, 20e-9, 6e-6)), None, "exceeds"),
    (replace(BASE, lines=4), None, "lines"),
    (replace(BASE, biases_v=(0.0, 0.0, 1.0)), None, "distinct"),
    (replace(BASE, scan_size_m=100e-6), FakeController(), "scanner"),
    (replace(BASE, heights_m=(10e-9, 20e-9, 1.5e-6)), FakeController(z_range_m=2e-6), "exceeds"),
    (replace(BASE, biases_v=(-4.0, 0.0, 4.0)), FakeController(bias_max_v=3.0), "controller's limit"),
    (replace(BASE, pixels=4096, line_rate_hz=1000.0), FakeController(sample_rate_max_hz=1e6), "samples/s"),
    (replace(BASE, bias_v=0.5), FakeController(missing={Capability.BIAS}), "bias output"),
    (BASE, FakeController(missing={Capability.COARSE_MOTOR}), "coarse motor"),
])
def test_settings_that_would_fail_later_are_refused(settings, controller, needle):
    with pytest.raises(PlanError, match=needle) as info:
        check_series_plan(settings, limits=SafetyLimits(), controller=controller)
    assert "\n" not in str(info.value)


def test_zero_bias_needs_no_bias_output_and_the_ui_needs_no_coarse_motor():
    bare = FakeController(missing={Capability.BIAS, Capability.COARSE_MOTOR})
    check_series_plan(BASE, limits=SafetyLimits(), controller=bare, approach=False)


def test_an_existing_series_name_is_refused_with_a_free_one():
    with pytest.raises(PlanError, match="'series1' already exists.*'series3'"):
        check_series_plan(BASE, limits=SafetyLimits(), existing_series=["series1", "series2"])
    assert free_series_name([]) == "series1" and free_series_name(["series1", "series3"]) == "series2"


@pytest.mark.parametrize("argv, needle", [
    (["--biases=-7,0,1"], "software limit"),  # refused before the controller is opened
    (["--size-um", "100"], "scanner"),  # refused once the controller tells its limits, before calibrating
])
def test_run_refuses_before_anything_is_written(tmp_path, capsys, argv, needle):
    assert main(["run", *argv, "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and needle in err[0]
    assert not list(tmp_path.glob("session-*.h5"))  # refused before the session file and any motion


def test_two_biases_image_one_height_but_not_a_decomposition():
    two = replace(BASE, heights_m=(30e-9,), biases_v=(0.0, 0.4))
    plan = check_series_plan(two, limits=SafetyLimits())
    assert plan.analysis == "imaging" and "images at 2 biases (V_cpd needs three)" in plan.sentence
    with pytest.raises(PlanError, match="needs at least three biases, got 2"):
        check_series_plan(replace(two, heights_m=BASE.heights_m), limits=SafetyLimits())


def test_a_series_the_disk_cannot_hold_is_refused_before_anything_moves(tmp_path, capsys):
    # 3 heights and the repeat x (phase, amplitude, frequency shift) + topography, 8 bytes a pixel: 13 images
    from assistant.procedures.preflight import check_disk_space, series_bytes

    assert series_bytes(BASE) == 13 * 8 * 16 * 8
    check_disk_space(series_bytes(BASE), tmp_path, free_bytes=2 * series_bytes(BASE))
    with pytest.raises(PlanError, match="needs about .* GB of disk"):
        check_disk_space(series_bytes(BASE), tmp_path, free_bytes=series_bytes(BASE))
    # 10^5 x 10^5 pixels at the default seven heights: terabytes, refused before the controller is opened
    code = main(["run", "--lines", "100000", "--pixels", "100000", "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "GB of disk" in err[0]
    assert not list((tmp_path / "out").glob("session-*.h5"))
