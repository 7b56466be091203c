"""The simulator's solenoid closing time: a valve commanded closed passes gas for ``close_time`` more,
which is the part of an overshoot no software trip can shorten."""

from __future__ import annotations

import pytest

from pycnoctl.sim.bench import SimBench
from pycnoctl.sim.testing import closed, make

FILL = 0.01  # s of fill through the fast test inlet


def _filled_then_closed(close_time: str) -> tuple[SimBench, float]:
    bench = SimBench(make({"valves": {"inlet": {"close_time": close_time}}}))
    closed(bench)
    bench.set_valves({"inlet": True})
    bench.advance(FILL)  # well short of the supply pressure: still filling fast
    bench.set_valves({"inlet": False})
    return bench, bench.gauge_pressure("cell")


def test_default_is_instant():
    bench, _ = _filled_then_closed("0 s")
    assert bench.actual_valves()["inlet"] is False


def test_the_inlet_stays_open_for_its_closing_time_and_then_shuts():
    bench, p_cmd = _filled_then_closed("50 ms")
    assert bench.actual_valves()["inlet"] is True and bench.commanded()["inlet"] is False
    bench.advance(0.049)
    assert bench.actual_valves()["inlet"] is True
    p_mid = bench.gauge_pressure("cell")
    bench.advance(0.002)
    assert bench.actual_valves()["inlet"] is False
    p_shut = bench.gauge_pressure("cell")
    assert p_shut > p_mid > p_cmd  # gas still came in after the command
    n_shut = bench.moles("cell")
    bench.advance(1.0)
    assert bench.moles("cell") == pytest.approx(n_shut, rel=1e-9)  # closed: no more gas


def test_the_extra_gas_is_the_flow_times_the_closing_time():
    fast, p0 = _filled_then_closed("0 s")
    slow, _ = _filled_then_closed("50 ms")
    fast.advance(0.1)
    slow.advance(0.1)
    n_fast, n_slow = fast.moles("cell"), slow.moles("cell")
    # the open inlet's flow just before the command, from the instant-closing bench's fill
    probe = SimBench(make())
    closed(probe)
    probe.set_valves({"inlet": True})
    probe.advance(FILL)
    n0 = probe.moles("cell")
    probe.advance(0.05)
    # within the integrator's own accuracy (solver.rel_moles: 8 % of the moles moved per step)
    assert n_slow - n_fast == pytest.approx(probe.moles("cell") - n0, rel=0.1)
    assert p0 > 0


def test_reopening_during_the_stroke_keeps_it_open():
    bench, _ = _filled_then_closed("50 ms")
    bench.set_valves({"inlet": True})
    bench.advance(0.2)
    assert bench.actual_valves()["inlet"] is True
