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
    wall.t += 5.0  # the caller was slow: virtual time is behind, no sleep needed
    clock.advance(1.0)
    assert len(wall.slept) == 1
    clock.advance(5.0)  # virtual 8 s, wall 7 s elapsed -> sleep 1 s
    assert wall.slept[-1] == pytest.approx(1.0)


@pytest.mark.parametrize("bad", [-1.0, float("nan")])
def test_negative_or_nan_step_refused(bad):
    with pytest.raises(ValueError, match="time step"):
        VirtualClock().advance(bad)


def test_unknown_pace_refused():
    with pytest.raises(ValueError, match="pace"):
        VirtualClock("slow")
