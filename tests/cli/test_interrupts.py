"""A Ctrl-C that library code swallowed while the command loaded is still honoured before the first motion."""

from __future__ import annotations

import os
import signal

import pytest

from assistant.cli.interrupts import remember_interrupts


def test_a_swallowed_ctrl_c_is_still_honoured():
    with remember_interrupts() as latch:
        try:
            os.kill(os.getpid(), signal.SIGINT)  # handled in this (main) thread at the next instruction
            signal.getsignal(signal.SIGINT)
        except KeyboardInterrupt:
            pass  # what a library catching everything would do
        assert latch.is_set()
        with pytest.raises(KeyboardInterrupt):
            latch.check()
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler  # restored


def test_nothing_set_without_a_signal():
    with remember_interrupts() as latch:
        latch.check()
    assert not latch.is_set()
