"""Interrupting the virtual clock: the action spending time stops at its next step, at once in realtime pace;
a withdraw cannot be interrupted; Ctrl-C leaves virtual time behind the wall clock; bounded lag per action."""

from __future__ import annotations

import threading
import time

import pytest

from simulated_stage.clock import VirtualClock
from simulated_stage.errors import StageAborted


class FakeWall:
    def __init__(self):
        self.t = 100.0

    def monotonic(self):
        return self.t

    def sleep(self, s):
        self.t += s


def test_realtime_interrupt_wakes_the_sleep_and_stops_at_a_whole_step():
    clock = VirtualClock("realtime")
    threading.Timer(0.05, clock.interrupt).start()
    t0 = time.monotonic()
    with pytest.raises(StageAborted):
        clock.advance(5.0, step_s=0.01)
    assert time.monotonic() - t0 < 1.0  # not the 5 s of the action
    steps = clock.now_s / 0.01
    assert abs(steps - round(steps)) < 1e-6 and 0.04 < clock.now_s < 1.0
    with pytest.raises(StageAborted, match="before it began"):  # stays interrupted until resumed
        clock.advance(0.1)
    clock.advance(0.0, interruptible=False)  # a withdraw still runs
    clock.resume()
    clock.advance(0.001)


def test_fast_pace_interrupt_stops_the_next_action_without_time():
    wall = FakeWall()
    clock = VirtualClock("fast", monotonic=wall.monotonic, sleep=wall.sleep)
    clock.advance(1.0)
    clock.interrupt()
    with pytest.raises(StageAborted):
        clock.advance(2.0)
    assert clock.now_s == 1.0 and clock.interrupted


def test_ctrl_c_in_a_realtime_sleep_leaves_virtual_time_at_the_wall_clock():
    wall = FakeWall()

    def sleep(s):
        wall.t += 0.3  # interrupted 0.3 s into the sleep
        raise KeyboardInterrupt

    clock = VirtualClock("realtime", monotonic=wall.monotonic, sleep=sleep)
    with pytest.raises(KeyboardInterrupt):
        clock.advance(9.0, step_s=0.1)
    assert clock.now_s == pytest.approx(0.3)  # the next action does not wait out the other 8.7 s


def test_bounded_lag_makes_each_action_take_its_own_time():
    wall = FakeWall()
    slept = []

    def sleep(s):
        slept.append(s)
        wall.t += s

    default = VirtualClock("realtime", monotonic=wall.monotonic, sleep=sleep)
    bounded = VirtualClock("realtime", monotonic=wall.monotonic, sleep=sleep, max_lag_s=0.005)
    wall.t += 1.0  # the host was busy for a second before the action
    for clock in (default, bounded):
        clock.begin()
        clock.advance(0.5)
    # the default clock catches up its 0.25 s credit of the busy second; the bounded one only 5 ms
    assert slept == [pytest.approx(0.5 - 0.25), pytest.approx(0.5 - 0.005)]


def test_set_pace_starts_realtime_from_now():
    wall = FakeWall()
    clock = VirtualClock("fast", monotonic=wall.monotonic, sleep=wall.sleep)
    clock.advance(100.0)  # far ahead of the wall clock
    clock.set_pace("realtime")
    t = wall.t
    clock.advance(0.25)
    assert wall.t - t == pytest.approx(0.25)
