"""A second Ctrl-C while the stage is being made safe does not cut the stop short."""

from __future__ import annotations

import os
import signal

from assistant.procedures.guard import stop_now
from drivers.base import Controller


class CtrlCDuringWithdraw:
    """A stand-in whose withdraw is hit by a SIGINT (a user pressing Ctrl-C again)."""

    def __init__(self) -> None:
        self.calls: list[str] = []

    def withdraw(self):
        self.calls.append("withdraw")
        os.kill(os.getpid(), signal.SIGINT)  # handled in this (main) thread at the next instruction

    def drive_off(self):
        self.calls.append("drive_off")

    def set_bias(self, v):
        self.calls.append(f"bias={v}")

    make_safe = Controller.make_safe


def test_a_ctrl_c_during_the_stop_does_not_leave_the_drive_on():
    ctl = CtrlCDuringWithdraw()
    stop_now(ctl)  # without the hold, KeyboardInterrupt escapes after the withdraw
    assert ctl.calls == ["withdraw", "drive_off", "bias=0.0"]
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # put back
