"""The command table: it covers the whole Controller interface, checks hard limits (NaN and infinities
included) and marks which commands may be repeated after a lost reply."""

from __future__ import annotations

import inspect
import math

import pytest

from drivers.base import Controller, Limits
from drivers.errors import CapabilityMissing, ControllerFault, LaserLost, LimitExceeded
from drivers.wire.checks import check_limits, check_types
from drivers.wire.commands import COMMANDS, command
from drivers.wire.error_map import error_for, exception_for
from drivers.wire.scpi import WireError


def test_every_controller_method_has_a_command():
    methods = {name for name, _ in inspect.getmembers(Controller, inspect.isfunction) if not name.startswith("_")}
    local = {"from_url", "close", "has", "record_deflection"}  # client-side, or the start/next pair below
    covered = {c.method for c in COMMANDS if c.method}
    missing = methods - covered - local
    assert not missing, f"no wire command for {sorted(missing)}"
    assert command("ACQuire:DEFLection:STARt").method == "record_deflection"


def test_headers_are_unique_in_both_forms():
    spellings = [c.spelling for c in COMMANDS]
    assert len(spellings) == len(set(spellings))


@pytest.mark.parametrize("spelling", ["MOTion:COARse", "SCAN:LINE?", "FORCe:CURVe?", "ACQuire:DEFLection:NEXT?"])
def test_relative_or_data_producing_commands_are_not_repeated(spelling):
    assert not command(spelling).safe_to_repeat


@pytest.mark.parametrize("spelling", ["MOTion:Z", "MOTion:WITHdraw", "DRIVe:OFF", "BIAS:VOLTage", "STATus?"])
def test_absolute_and_idempotent_commands_may_be_repeated(spelling):
    assert command(spelling).safe_to_repeat


LIM = Limits()


@pytest.mark.parametrize("spelling,args", [
    ("MOTion:Z", (LIM.z_range_m * 1.0001,)), ("MOTion:Z", (-1e-12,)), ("MOTion:Z", (math.nan,)),
    ("MOTion:Z", (math.inf,)), ("BIAS:VOLTage", (LIM.bias_max_v + 1e-9,)), ("BIAS:VOLTage", (-math.inf,)),
    ("DRIVe:SET", (1e5, LIM.drive_max_v * 2)), ("DRIVe:SET", (LIM.frequency_max_hz * 2, 0.1)),
    ("SCAN:LINE?", (0.0, 0.0, 1e-6, 16, 1.0, (10e-9, LIM.bias_max_v * 2))),
    ("SCAN:LINE?", (0.0, 0.0, 1e-6, 16, 1.0, (LIM.z_range_m * 2, 0.0))),
    ("SCAN:LINE?", (0.0, 0.0, 1e-6, 16, 1.0, (math.nan, 0.0))),
    ("FEEDback:SET", (True, math.nan, None, None)), ("MOTion:XY", (1.0, 0.0)),
])
def test_out_of_limit_arguments_are_refused(spelling, args):
    cmd = command(spelling)
    with pytest.raises(LimitExceeded) as err:
        check_limits(cmd, check_types(cmd, args), LIM)
    assert err.value.quantity in str(err.value)


def test_odd_pass_list_is_a_missing_parameter():
    cmd = command("SCAN:LINE?")
    with pytest.raises(WireError) as err:
        check_limits(cmd, (0.0, 0.0, 1e-6, 16, 1.0, (10e-9,)), LIM)
    assert err.value.code == -109


def test_limits_at_the_edges_pass():
    check_limits(command("MOTion:Z"), (LIM.z_range_m,), LIM)
    check_limits(command("BIAS:VOLTage"), (-LIM.bias_max_v,), LIM)


@pytest.mark.parametrize("exc,cls", [
    (LimitExceeded("z_m", 2e-5, 0.0, 1e-5, "m"), LimitExceeded),
    (LimitExceeded("bias_v", -11.0, -10.0, 10.0, "V"), LimitExceeded),
    (CapabilityMissing("no bias"), CapabilityMissing),
    (LaserLost(310, "sum 0.01 V below 0.5 V"), LaserLost),
    (ControllerFault(320, "Z jumped"), ControllerFault),
])
def test_errors_survive_the_wire(exc, cls):
    code, message = error_for(exc)
    assert code != 0
    back = exception_for(code, message)
    assert type(back) is cls
    if isinstance(exc, LimitExceeded):
        assert (back.quantity, back.low, back.high, back.unit) == (exc.quantity, exc.low, exc.high, exc.unit)
        assert back.value == pytest.approx(exc.value, rel=1e-5)
    if isinstance(exc, ControllerFault):
        assert back.code == exc.code and str(back) == str(exc)


def test_a_refused_coarse_count_adds_no_waiting_time():
    # the client waits the move's expected time (1 ms a step) for its reply; a count beyond the limit is refused
    # at once, so a lost reply to it must not keep the client waiting (it waited 200 s for 200 000 steps)
    from drivers.wire.commands import MAX_COARSE_STEPS

    coarse, lim = command("MOTion:COARse"), Limits()
    assert coarse.expected_s((2000,), lim) == pytest.approx(2.0)
    assert coarse.expected_s((-MAX_COARSE_STEPS,), lim) == pytest.approx(100.0)
    assert coarse.expected_s((MAX_COARSE_STEPS + 1,), lim) == coarse.expected_s((-10**9,), lim) == 0.0
