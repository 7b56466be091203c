"""The real-time simulator clock's speed factor: simulated time runs `speed` times the wall clock."""

import time

import pytest

from pycnoctl.sim.clock import SimClock


def test_speed_scales_sleep_and_now():
    clock = SimClock(realtime=True, speed=20.0)
    t0, w0 = clock.now(), time.monotonic()
    clock.sleep(2.0)  # two simulated seconds take a tenth of a wall second
    wall = time.monotonic() - w0
    assert 0.09 <= wall < 0.5
    assert clock.now() - t0 == pytest.approx(wall * 20.0, rel=0.05)


def test_speed_must_be_positive():
    with pytest.raises(ValueError):
        SimClock(realtime=True, speed=0.0)
