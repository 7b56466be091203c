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


def test_a_sped_up_simulator_widens_the_stale_limit_to_half_a_wall_second():
    # at speed S a host pause of 0.5 s wall is 0.5*S s of instrument time (simulated clock scaling)
    from pycnoctl.drivers.simulated import build_sim_instrument

    assert build_sim_instrument().limits.stale_after == pytest.approx(1.0)
    assert build_sim_instrument(realtime=True).limits.stale_after == pytest.approx(1.0)
    assert build_sim_instrument(realtime=True, speed=20).limits.stale_after == pytest.approx(10.0)
