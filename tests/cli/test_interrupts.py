"""A Ctrl-C that library code swallowed while the command loaded is still honoured before the first motion."""

from __future__ import annotations

import os
import signal
import time

import pytest

from assistant.cli.interrupts import TERMINATIONS, remember_interrupts, terminations_as_interrupts


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


class _Stage:
    """A controller stand-in that records the stop."""

    def __init__(self):
        self.aborted = 0

    def abort(self):
        self.aborted += 1


def test_a_ctrl_c_that_compiled_code_turned_into_another_error_still_stops_the_stage(monkeypatch):
    # a KeyboardInterrupt raised inside h5py's lock came back as "SystemError: ... returned a result with an
    # exception set"; the run then exited 1 with that text instead of stopping the stage and exiting 130
    from assistant.cli import interrupts
    from assistant.procedures import guard

    stage = _Stage()
    monkeypatch.setattr(guard, "stop_now", lambda ctl: ctl.abort())
    with pytest.raises(KeyboardInterrupt) as caught, interrupts.stop_on_interrupt(stage):
        try:
            raise KeyboardInterrupt
        except KeyboardInterrupt:
            raise SystemError("<cyfunction FastRLock.__exit__> returned a result with an exception set")  # noqa: B904
    assert stage.aborted == 1 and caught.value.stage_made_safe
    assert isinstance(caught.value.__cause__, SystemError)
    # any other error stops the stage as well and leaves as itself (before, it passed untouched, and an error
    # between two steps, with no step's guard around it, left the tip engaged)
    with pytest.raises(ValueError) as other, interrupts.stop_on_interrupt(stage):
        raise ValueError("not an interrupt")
    assert stage.aborted == 2 and other.value.stage_made_safe


def test_an_error_between_steps_with_the_tip_engaged_leaves_the_stage_safe(tmp_path, monkeypatch, capsys):
    # the approach's record is written after the approach's guard has ended, with the tip engaged: a full disk
    # there left the tip engaged, the feedback and the drive on when mfma run exited
    import errno

    from assistant.cli import main
    from assistant.storage.session_file import SessionFile
    from drivers.simulated import SimulatedController

    states = []
    close = SimulatedController.close

    def closing(self):
        states.append(self.status())
        close(self)

    def full_disk(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(SimulatedController, "close", closing)
    monkeypatch.setattr(SessionFile, "write_approach", full_disk)
    code = main(["run", "--lines", "8", "--pixels", "16", "--heights", "20,40", "--thermal-seconds", "0.5",
                 "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1 and "No space left on device" in err[-1] and err[-1].endswith("the stage was made safe")
    assert states and states[-1].safe, states


def test_main_exits_130_for_a_ctrl_c_wrapped_by_compiled_code(monkeypatch, capsys):
    from assistant.cli import cmd_probes, main

    def wrapped(args):
        try:
            raise KeyboardInterrupt
        except KeyboardInterrupt:
            raise SystemError("returned a result with an exception set")  # noqa: B904

    monkeypatch.setattr(cmd_probes, "run", wrapped)
    assert main(["probes"]) == 130
    assert capsys.readouterr().err.strip() == "mfma: interrupted"


@pytest.mark.parametrize("signum", TERMINATIONS)
def test_a_termination_request_is_handled_as_ctrl_c(signum):
    """SIGTERM (`kill`) and SIGHUP (the terminal closed) end Python at once by default, leaving the stage as it
    was; inside a command they reach the same stop as Ctrl-C, and the latch remembers them."""
    assert signal.getsignal(signum) is signal.SIG_DFL
    with terminations_as_interrupts(), remember_interrupts() as latch:
        with pytest.raises(KeyboardInterrupt):
            os.kill(os.getpid(), signum)
            time.sleep(1.0)  # the handler runs at the next bytecode; this only waits for it
        assert latch.is_set()
    assert signal.getsignal(signum) is signal.SIG_DFL  # put back


def test_a_termination_request_interrupts_even_with_ctrl_c_ignored():
    """A command started in the background by a shell without job control inherits SIGINT ignored; a `kill`
    must still stop it."""
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        with terminations_as_interrupts(), pytest.raises(KeyboardInterrupt):
            os.kill(os.getpid(), signal.SIGTERM)
            time.sleep(1.0)
    finally:
        signal.signal(signal.SIGINT, previous)


def test_a_termination_during_the_stop_does_not_cut_it_short():
    """Like a second Ctrl-C, a `kill` that arrives while the stage is being made safe waits for the stop."""
    from assistant.procedures.guard import stop_now

    class SlowStop:
        finished = False

        def abort(self):
            os.kill(os.getpid(), signal.SIGTERM)
            time.sleep(0.3)  # the handler has run by now
            self.finished = True

    ctl = SlowStop()
    with terminations_as_interrupts():
        stop_now(ctl)
    assert ctl.finished
