"""The safety guard: whatever stops a procedure, the stage ends withdrawn, drive off, bias zero."""

from __future__ import annotations

import pytest

from assistant.procedures.events import CancelToken, Cancelled, Notice
from assistant.procedures.guard import LimitsFileError, SafetyError, SafetyLimits, load_limits, safety_guard


class Recorder:
    """A controller stand-in recording the safe-state calls; withdraw can be made to fail."""

    def __init__(self, fail_withdraw: bool = False) -> None:
        self.calls: list[str] = []
        self.fail_withdraw = fail_withdraw

    def withdraw(self):
        self.calls.append("withdraw")
        if self.fail_withdraw:
            raise ConnectionError("link down")

    def drive_off(self):
        self.calls.append("drive_off")

    def set_bias(self, v):
        self.calls.append(f"bias={v}")

    from drivers.base import Controller

    make_safe = Controller.make_safe


@pytest.mark.parametrize("exc", [RuntimeError("boom"), KeyboardInterrupt(), Cancelled("user")])
def test_guard_makes_safe_then_saves_then_reraises(exc):
    ctl, events, order = Recorder(), [], []
    with pytest.raises(type(exc)):
        with safety_guard(ctl, sink=events.append, save=lambda: order.append(list(ctl.calls))):
            raise exc
    assert ctl.calls == ["withdraw", "drive_off", "bias=0.0"]
    assert order == [["withdraw", "drive_off", "bias=0.0"]]  # the save ran after the stage was safe
    assert any(isinstance(e, Notice) and "withdrawn" in e.text for e in events)


def test_every_safe_step_is_tried_even_if_withdraw_fails():
    ctl, events = Recorder(fail_withdraw=True), []
    with pytest.raises(RuntimeError):
        with safety_guard(ctl, sink=events.append):
            raise RuntimeError("boom")
    assert ctl.calls == ["withdraw", "drive_off", "bias=0.0"]
    assert any(e.level == "error" and "by hand" in e.text for e in events)


def test_no_exception_no_action():
    ctl = Recorder()
    with safety_guard(ctl):
        pass
    assert ctl.calls == []


def test_cancel_token():
    tok = CancelToken()
    tok.raise_if_set()
    tok.set()
    with pytest.raises(Cancelled):
        tok.raise_if_set()


def test_software_limits_name_quantity_value_and_limit():
    lim = SafetyLimits(bias_max_v=2.0)
    with pytest.raises(SafetyError, match=r"3 V .*±2 V"):
        lim.check_bias(3.0)
    with pytest.raises(SafetyError, match="laser"):
        lim.check_sum(float("nan"))
    lim.check_bias(-2.0)


def test_limits_file(tmp_path):
    f = tmp_path / "limits.toml"
    f.write_text("bias_max_v = 1.5\nmin_sum_v = 2\n")
    lim = load_limits(f)
    assert lim.bias_max_v == 1.5 and lim.min_sum_v == 2.0 and lim.lift_height_max_m == SafetyLimits().lift_height_max_m
    f.write_text("bias_max = 1.5\n")
    with pytest.raises(LimitsFileError, match="unknown key 'bias_max'"):
        load_limits(f)
    for bad in ("bias_max_v = -1", "bias_max_v = inf", "field_max_a_per_m = nan"):
        f.write_text(bad + "\n")
        with pytest.raises(LimitsFileError, match="finite number > 0"):  # an infinite limit is none
            load_limits(f)
    # a limit the software cannot hold the stage to is refused, not accepted and ignored
    f.write_text("z_speed_max_m_per_s = 1e-6\n")
    with pytest.raises(LimitsFileError, match="the Z speed is the controller's own"):
        load_limits(f)
    with pytest.raises(LimitsFileError, match="does not exist"):
        load_limits(tmp_path / "missing.toml")
