"""The cycle measurer's leak flag: a steady slope under a settle's relaxation that neither the noise nor
the exponential explains (a leaking valve seat), on hand-made rows and on the simulator."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths.cycle import CycleMeasurer, CyclePlan, drift_unexplained, linear_drift
from pycnoctl.controller.maths.settle import SettleCriteria
from tests.measurer_feed import StateFeeder

PA = 101325.0
CRIT = SettleCriteria(window=4.0, max_drift=2.0, min_time=3.0, max_time=60.0, extrapolate=False)


def relax(slope: float, seed: int = 3, noise: float = 1.0, n: int = 300):
    """A settle after a fill: 2 kPa of heat relaxing with tau 2 s, a steady slope, gauge noise."""
    rng = np.random.default_rng(seed)
    t = [k * 0.1 for k in range(n)]
    p = [130e3 + 2e3 * math.exp(-x / 2.0) + slope * x + rng.normal(0.0, noise) for x in t]
    return t, p


def test_linear_drift_recovers_the_slope_under_the_relaxation():
    t, p = relax(-1.5)
    d = linear_drift(t, p)
    assert d is not None
    assert d.slope == pytest.approx(-1.5, abs=4 * d.u_slope)
    assert d.tau == pytest.approx(2.0, rel=0.15)


@pytest.mark.parametrize("slope, flagged", [(0.0, False), (-0.02, False), (-1.5, True), (1.5, True)])
def test_only_a_slope_beyond_noise_and_the_model_floor_is_unexplained(slope, flagged):
    t, p = relax(slope)
    assert (drift_unexplained(t, p, u_p=1.0) is not None) is flagged


def _cycle(slope: float) -> list[str]:
    """One cycle through the measurer; the P1 settle carries the slope; returns the cycle's flags."""
    plan = CyclePlan(baseline=CRIT, filled=CRIT, expanded=CRIT, chambers=ChamberCalibration(12e-6, 8e-6),
                     gas="helium", u_p=1.0, u_t=0.1, discard=0)
    m = CycleMeasurer(plan)
    run = StateFeeder(m, noise=1.0, seed=5).hold

    run("vent", lambda x: 0.0, 2.0)
    run("baseline", lambda x: 0.0, 20.0)
    run("fill", lambda x: 1e4 * x, 5.0)
    run("settle_filled", lambda x: 130e3 + 2e3 * math.exp(-x / 2.0) + slope * x, 60.0)
    run("expand", lambda x: 80e3, 0.1)
    run("settle_expanded", lambda x: 80e3 - 1e3 * math.exp(-x / 2.0), 60.0)
    run("vent", lambda x: 0.0, 1.0)
    assert m.results, "the cycle did not complete"
    return list(m.results[-1].flags)


def test_a_leak_the_drift_rule_passed_is_flagged_on_the_cycle():
    assert "drift_p1" in _cycle(-1.2)  # below max_drift (2 Pa/s): settled, but steady


def test_a_clean_relaxation_is_not_flagged():
    assert not [f for f in _cycle(0.0) if f.startswith("drift")]


def test_an_expansion_valve_leak_on_the_simulator_completes_flagged(tmp_path):
    """1e-10 m^3/s past the closed expansion valve: the run completes, every cycle carries drift_p1,
    while the same bench without the leak carries none."""
    from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
    from pycnoctl.controller.record.catalog import Catalog
    from pycnoctl.controller.run.control import Controller
    from pycnoctl.drivers.simulated import build_sim_instrument
    from pycnoctl.sim.config import DEFAULT_CONFIG, load_sim_config

    flags = {}
    for leak in (False, True):
        cfg = load_sim_config(DEFAULT_CONFIG)
        if leak:
            cfg = cfg.model_copy(update={"valves": {**cfg.valves, "exp_small": cfg.valves["exp_small"].model_copy(
                update={"leak": 1e-10})}})
        inst = build_sim_instrument(cfg)
        with Catalog(tmp_path / f"c{leak}.sqlite") as cat:
            prepared = prepare(RunRequest("quick-demo"), inst, cat)
            summary = execute(prepared, Controller(inst), root=tmp_path / f"runs{leak}", catalog=cat)
        inst.close()
        assert summary["status"] == "completed"
        flags[leak] = [c["flags"] for c in summary["cycles"]]
    assert all("drift_p1" in f for f in flags[True]) and len(flags[True]) == 3
    assert not any(f for f in flags[False])
