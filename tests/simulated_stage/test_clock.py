"""Virtual clock: fast pace never waits, realtime pace keeps virtual time behind the (injected) wall clock."""

import pytest

from simulated_stage.clock import VirtualClock


class FakeWall:
    def __init__(self):
        self.t = 100.0
        self.slept = []

    def monotonic(self):
        return self.t

    def sleep(self, s):
        self.slept.append(s)
        self.t += s


def test_fast_counts_without_waiting():
    wall = FakeWall()
    clock = VirtualClock("fast", monotonic=wall.monotonic, sleep=wall.sleep)
    clock.advance(1.5)
    clock.advance(0.25)
    assert clock.now_s == pytest.approx(1.75)
    assert wall.slept == []


def test_realtime_sleeps_until_wall_clock_catches_up():
    wall = FakeWall()
    clock = VirtualClock("realtime", monotonic=wall.monotonic, sleep=wall.sleep)
    clock.advance(2.0)
    assert wall.slept == [pytest.approx(2.0)]
    wall.t += 0.2  # the caller computed for 0.2 s: within the credit, the next step overlaps it
    clock.advance(1.0)
    assert wall.slept[-1] == pytest.approx(0.8)
    wall.t += 5.0  # the caller was idle for 5 s: only 0.25 s of it is credited
    clock.advance(1.0)
    assert wall.slept[-1] == pytest.approx(0.75)
    clock.advance(5.0)  # no credit left: the whole step is waited for
    assert wall.slept[-1] == pytest.approx(5.0)


def test_realtime_after_a_long_idle_still_takes_real_time():
    # an idle server must not let the next scan lines run at full speed
    wall = FakeWall()
    clock = VirtualClock("realtime", monotonic=wall.monotonic, sleep=wall.sleep)
    wall.t += 60.0
    for _ in range(10):
        clock.advance(0.5)
    assert sum(wall.slept) == pytest.approx(5.0 - 0.25)


@pytest.mark.parametrize("bad", [-1.0, float("nan")])
def test_negative_or_nan_step_refused(bad):
    with pytest.raises(ValueError, match="time step"):
        VirtualClock().advance(bad)


def test_unknown_pace_refused():
    with pytest.raises(ValueError, match="pace"):
        VirtualClock("slow")
