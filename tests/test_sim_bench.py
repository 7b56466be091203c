"""Simulator bench: sensor models, faults, clock, reproducibility."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from pycnoctl.controller.domain.clock import Clock
from pycnoctl.sim.bench import SimBench
from pycnoctl.sim.clock import SimClock
from pycnoctl.sim.sensors import SensorModel
from pycnoctl.sim.testing import closed, fill, make


def _pressure_cfg(**p):
    return make({"instruments": {"pressure": p}})


# ------------------------------------------------------------------ sensors
def test_transducer_noise_sd_and_mean():
    # white Gaussian noise: sample sd of 4000 draws lies within ~4 % of sigma (chi distribution,
    # relative sd 1/sqrt(2N) = 1.1 %)
    b = SimBench(_pressure_cfg(noise="0.2 mbar"))
    vals = []
    for _ in range(4000):
        b.advance(0.1)
        vals.append(b.read_pressure().value)
    assert np.std(vals, ddof=1) == pytest.approx(20.0, rel=0.04)
    assert abs(np.mean(vals)) < 4 * 20.0 / math.sqrt(4000)


def test_transducer_resolution_and_zero_offset():
    b = SimBench(_pressure_cfg(noise="0.3 mbar", resolution="0.1 mbar", zero_offset="0.5 mbar"))
    vals = []
    for _ in range(2000):
        b.advance(0.1)
        vals.append(b.read_pressure().value)
    steps = np.asarray(vals) / 10.0
    assert np.allclose(steps, np.round(steps), atol=1e-9)  # multiples of the resolution
    assert np.mean(vals) == pytest.approx(50.0, abs=3.0)  # zero offset shows as a mean


def test_sample_and_hold():
    m = SensorModel(noise=1.0, update_rate=10.0, rng=np.random.default_rng(1))
    a, b = m.sample(0.01, 0.0), m.sample(0.05, 0.0)
    assert a == b  # same update period: the identical held value
    assert m.sample(0.12, 0.0) != a


def test_first_order_lag_step_response():
    # first-order lag: step response 1 - exp(-t/tau) at the update instants (ZOH exact for a step)
    m = SensorModel(update_rate=100.0, lag=0.5)
    m.sample(0.0, 0.0)
    for k in range(1, 200):
        y = m.sample(k * 0.01, 1.0)
        assert y == pytest.approx(1.0 - math.exp(-k * 0.01 / 0.5), abs=1e-12)


def test_seeded_runs_are_reproducible_and_seeds_differ():
    def run(seed):
        b = SimBench(make({"instruments": {"pressure": {"noise": "0.1 mbar"}}}, seed=seed))
        out = []
        for _ in range(50):
            b.advance(0.1)
            out.append(b.read_pressure().value)
        return out

    assert run(5) == run(5)
    assert run(5) != run(6)


def test_gauge_reading_follows_ambient_step():
    b = SimBench(make(faults=[{"kind": "ambient_step", "at": "10 s", "pressure_step": "5 hPa"}]))
    closed(b)
    b.advance(5.0)
    before = b.read_pressure().value
    baro0 = b.read_barometer().value
    b.advance(10.0)
    # sealed cell, ambient up 500 Pa: the gauge reading drops by 500 Pa, the barometer rises
    assert b.read_pressure().value - before == pytest.approx(-500.0, abs=1e-6)
    assert b.read_barometer().value - baro0 == pytest.approx(500.0, abs=1e-6)
    assert any(e[1].endswith("ambient_step") and e[0] == 10.0 for e in b.events)


# ------------------------------------------------------------------ faults
def test_regulator_failure_fires_on_second_inlet_opening():
    from pycnoctl.sim.config import load_sim_config, shipped_configs

    b = SimBench(load_sim_config(shipped_configs()["regulator_failure"]))
    closed(b)
    b.set_valves({"inlet": True})
    b.advance(3.0)
    assert b.supply_gauge(b.clock.now()) == pytest.approx(1.4e5)
    b.set_valves({"inlet": False})
    b.advance(2.0)
    t_open = b.clock.now()
    b.set_valves({"inlet": True})
    b.advance(0.5)
    assert b.supply_gauge(b.clock.now()) == pytest.approx(1.4e5)  # delay 1 s not yet over
    b.advance(1.5)
    assert b.events[-1][0] == pytest.approx(t_open + 1.0)
    assert b.supply_gauge(b.clock.now()) == pytest.approx(1.4e5 + 0.5e5 * 1.0)  # 0.5 bar/s for 1 s


def test_stuck_closed_inlet_is_invisible_in_commanded_state():
    b = SimBench(make(faults=[{"kind": "valve_stuck", "valve": "inlet", "open": False, "at": "0 s"}]))
    closed(b)
    b.set_valves({"inlet": True})
    b.advance(5.0)
    assert b.commanded()["inlet"] is True
    assert b.actual_valves()["inlet"] is False
    assert b.gauge_pressure("cell") == pytest.approx(0.0, abs=1e-6)


def test_stuck_open_on_third_opening():
    b = SimBench(make(faults=[{"kind": "valve_stuck", "valve": "inlet", "open": True,
                               "on_opening": {"valve": "inlet", "count": 3}}]))
    closed(b)
    for _ in range(3):
        b.set_valves({"inlet": True})
        b.advance(1.0)
        b.set_valves({"inlet": False})
        b.advance(1.0)
    assert b.actual_valves()["inlet"] is True
    b.advance(120.0)  # the inlet's metering restrictor fills the cell in tens of seconds
    assert b.gauge_pressure("cell") == pytest.approx(1.4e5, rel=1e-3)


def test_leak_fault_with_duration():
    b = SimBench(make(faults=[{"kind": "valve_leak", "valve": "vent", "conductance": "1e-9 m^3/s",
                               "at": "60 s", "duration": "60 s"}]))
    fill(b, 3.0)
    b.advance(50.0)  # thermally settled (tau 2 s)
    p0 = b.pressure("cell")
    b.advance(5.0)
    assert b.pressure("cell") == pytest.approx(p0, rel=1e-9)  # no leak yet
    b.advance(65.0)  # leak active from 60 s to 120 s
    p1 = b.pressure("cell")
    # isothermal mass balance through a linear leak: the gauge pressure decays at C/V_gas (as in
    # test_leak_decay_rate_matches_conductance); 3 % allows the leak's own expansion cooling
    expect = (p0 - b.ambient_pressure()) * (1.0 - math.exp(-60.0 * 1e-9 / 7e-6))
    assert p0 - p1 == pytest.approx(expect, rel=0.03)
    b.advance(5.0)
    p2 = b.pressure("cell")
    b.advance(30.0)
    # leak cleared after 60 s: only the small thermal recovery of the leak's expansion cooling remains
    assert b.pressure("cell") == pytest.approx(p2, rel=2e-5)
    assert [e[2] for e in b.events] == ["start", "clear"]


def test_fault_on_pressure_above():
    b = SimBench(make(faults=[{"kind": "transducer", "mode": "silent",
                               "on_pressure_above": {"node": "cell", "pressure": "1 bar"}}]))
    closed(b)
    assert b.transducer_mode() == "ok"
    b.set_valves({"inlet": True})
    b.advance(3.0)
    assert b.transducer_mode() == "silent"
    t_fire = b.events[-1][0]
    assert 0.0 < t_fire < 3.0
    assert math.isnan(b.read_pressure().value)


def test_transducer_drift_and_frozen():
    b = SimBench(make())
    closed(b)
    b.advance(1.0)
    b.inject({"kind": "transducer", "mode": "drifting", "drift_rate": "10 Pa/s"})
    assert b.transducer_mode() == "drifting"
    b.advance(20.0)
    assert b.read_pressure().value == pytest.approx(200.0, abs=1e-6)
    b.inject({"kind": "transducer", "mode": "frozen"})
    frozen = b.read_pressure().value
    b.set_valves({"inlet": True})
    b.advance(3.0)
    s = b.read_pressure()
    assert s.mode == "frozen" and s.value == frozen
    assert b.gauge_pressure("cell") > 1e5


def test_disconnect_device():
    b = SimBench(make(faults=[{"kind": "disconnect", "device": "pressure", "at": "2 s", "duration": "3 s"}]))
    b.advance(1.0)
    assert b.connected("pressure")
    b.advance(2.0)
    assert not b.connected("pressure") and b.read_pressure().mode == "disconnected"
    b.advance(3.0)
    assert b.connected("pressure")


# ------------------------------------------------------------------ clock
def test_sim_clock_is_a_clock_and_drives_physics():
    b = SimBench(make())
    assert isinstance(b.clock, Clock)
    closed(b)
    b.set_valves({"inlet": True})
    p0 = b.read_pressure().value
    b.clock.sleep(2.0)  # only the clock moves; physics follows on the next read
    assert b.clock.now() == pytest.approx(2.0)
    assert b.read_pressure().value > p0 + 1e5


def test_realtime_clock_follows_wall_clock():
    clock = SimClock(realtime=True)
    b = SimBench(make(), clock)
    w0, s0 = time.monotonic(), clock.now()
    clock.sleep(0.2)
    dw, ds = time.monotonic() - w0, clock.now() - s0
    assert ds == pytest.approx(dw, abs=0.02)
    assert ds >= 0.2
    b.set_valves({"inlet": True, "vent": False, "exp_small": False, "exp_large": False})
    time.sleep(0.3)
    assert b.gauge_pressure("cell") > 1e4  # the physics advanced with the wall clock


def test_a_command_that_changes_nothing_leaves_the_trajectory_alone():
    # a repeated safe state (the engine asserts it often) must not cut the running step or restart
    # the step-size control: two benches, one of them told the same thing again mid-transient,
    # give bit-identical readings and take the same number of steps
    a, b = SimBench(make()), SimBench(make())
    for bench in (a, b):
        fill(bench, 2.0)
        bench.set_valves({"exp_small": True})
    reads_a, reads_b = [], []
    for k in range(300):
        if k % 7 == 3:
            b.set_valves({"exp_small": True, "inlet": False, "vent": False})
        for bench, out in ((a, reads_a), (b, reads_b)):
            bench.advance(0.1)
            out.append(bench.read_pressure().value)
    assert reads_a == reads_b
    assert a.steps == b.steps
    b.set_valves({"vent": True})  # a real change still takes effect at once
    b.advance(5.0)
    assert abs(b.gauge_pressure("cell")) < 1e3 < abs(a.gauge_pressure("cell"))
