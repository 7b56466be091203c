"""The cycle measurer on hand-made rows: what it takes as the zero, P1 and P2, when a cycle counts as
complete, and how a settle that ended undecided is flagged. The volume check is the ideal-gas mass
balance P1 (Vc - Vs) + Pa Vr = P2 (Vc - Vs + Vr), i.e. Vs = Vc - Vr (P2 - Pa) / (P1 - P2), worked by
hand (the textbook gas-expansion relation, from memory)."""

from __future__ import annotations

import math

import pytest

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths.cycle import CycleMeasurer, CyclePlan, Row
from pycnoctl.controller.maths.settle import SettleCriteria, SettleStatus

PA = 101325.0
VC, VR = 12e-6, 8e-6
CRIT = SettleCriteria(window=2.0, max_drift=1.0, min_time=1.0, max_time=30.0, extrapolate=False)
SLOW = SettleCriteria(window=2.0, max_drift=1.0, min_time=50.0, max_time=60.0, extrapolate=False)


def plan(filled: SettleCriteria = CRIT) -> CyclePlan:
    return CyclePlan(baseline=CRIT, filled=filled, expanded=CRIT, chambers=ChamberCalibration(VC, VR),
                     gas="nitrogen", u_p=1.0, u_t=0.1, discard=0)


class Feeder:
    """Feeds a state for a number of 0.1 s rows at a constant gauge pressure; keeps the statuses."""

    def __init__(self, meter: CycleMeasurer) -> None:
        self.meter, self.t = meter, 0.0

    def hold(self, state: str, gauge: float, seconds: float, temp: float = 295.0) -> list[SettleStatus | None]:
        out = []
        for _ in range(round(seconds / 0.1)):
            self.t += 0.1
            out.append(self.meter.feed(state, Row(self.t, gauge, PA, temp)))
            if out[-1] is SettleStatus.SETTLED:
                break
        return out


def a_cycle(f: Feeder, zero: float, p1: float, p2: float, after: str = "vent") -> None:
    f.hold("vent", 0.0, 1.0)
    assert f.hold("baseline", zero, 10.0)[-1] is SettleStatus.SETTLED
    f.hold("fill", zero + p1 / 2, 0.5)
    f.hold("settle_filled", zero + p1, 10.0)
    f.hold("expand", zero + p2, 0.1)
    f.hold("settle_expanded", zero + p2, 10.0)
    f.hold(after, 0.0, 0.5)


def test_a_cycle_takes_pressures_above_its_zero_and_gives_the_expansion_volume() -> None:
    meter = CycleMeasurer(plan())
    p1, p2 = 1.0e5, 0.45e5
    a_cycle(Feeder(meter), 250.0, p1, p2)
    [c] = meter.results
    assert c.baseline_pa == pytest.approx(250.0, abs=1e-6)
    assert c.p1_gauge_pa == pytest.approx(p1, abs=1e-6) and c.p2_gauge_pa == pytest.approx(p2, abs=1e-6)
    assert c.ta_k == pytest.approx(295.0) and c.flags == []
    # ideal gas, isothermal, gas in the cell at P1 expanding into Vr at Pa (mass balance, worked by hand)
    vs = VC - VR * ((PA + p2) - PA) / ((PA + p1) - (PA + p2))
    assert c.volume_m3 == pytest.approx(vs, rel=2e-3)  # nitrogen's small non-ideality only
    assert c.u_volume_m3 > 0 and c.kept


def test_a_cycle_cut_short_after_its_p2_is_not_complete() -> None:
    meter = CycleMeasurer(plan())
    a_cycle(Feeder(meter), 0.0, 1.0e5, 0.45e5, after="fault")
    assert meter.results == [] and len(meter.cycles) == 1  # begun, measured, but never vented


def test_an_undecided_settle_followed_by_its_next_step_is_taken_and_flagged() -> None:
    meter = CycleMeasurer(plan(filled=SLOW))  # P1 cannot decide before 50 s; the trace moves on at 10 s
    a_cycle(Feeder(meter), 0.0, 1.0e5, 0.45e5)
    [c] = meter.results
    assert c.flags == ["unsettled_p1"] and c.p1_gauge_pa == pytest.approx(1.0e5, abs=1e-6)


def test_give_up_takes_the_estimate_so_far_once_and_refuses_without_one() -> None:
    meter = CycleMeasurer(plan(filled=SLOW))
    f = Feeder(meter)
    assert meter.give_up() is False  # no settle yet
    f.hold("vent", 0.0, 1.0)
    f.hold("baseline", 0.0, 10.0)
    f.hold("fill", 5e4, 0.5)
    assert set(f.hold("settle_filled", 1e5, 5.0)) == {SettleStatus.WAITING}
    assert meter.give_up() is True and meter.give_up() is True
    assert meter.cycles[0].flags == ["unsettled_p1"]  # flagged once


def test_no_zero_no_cycle_and_invalid_rows_are_skipped() -> None:
    meter = CycleMeasurer(plan())
    f = Feeder(meter)
    f.hold("vent", 0.0, 1.0)
    f.hold("baseline", math.nan, 3.0)  # no valid pressure at all: no zero
    f.hold("fill", 5e4, 0.5)
    assert meter.cycles == [] and meter.zero is None


def test_leak_rate_is_the_slope_of_the_hold() -> None:
    meter = CycleMeasurer(plan())
    for i in range(50):
        meter.feed("leak_hold", Row(10.0 + 0.1 * i, 1e5 - 2.0 * 0.1 * i, PA, 295.0))
    assert meter.leak_rate == pytest.approx(-2.0, rel=1e-9)


def test_drift_fit_picks_the_same_time_constant_as_a_plain_scan() -> None:
    # The variable-projection grid search must choose what fitting every grid point in full would
    # (numpy.linalg.lstsq per tau, the plain reference) and give the same slope.
    import numpy as np

    from pycnoctl.controller.maths.cycle import linear_drift

    rng = np.random.default_rng(11)
    for _ in range(60):
        n = int(rng.integers(8, 300))
        t = np.sort(rng.uniform(0.0, rng.uniform(2.0, 200.0), n))
        p = (1e5 + rng.normal(0, 500) * np.exp(-t / rng.uniform(0.2, 100.0)) + rng.normal(0, 2) * t
             + rng.normal(0, rng.uniform(0.1, 20.0), n))
        ts = t - t[0]
        best = None
        for tau in np.geomspace(0.1, 3.0 * float(ts[-1]), 60):
            x = np.column_stack([np.ones(n), ts, np.exp(-ts / tau)])
            coef = np.linalg.lstsq(x, p, rcond=None)[0]
            r = p - x @ coef
            if best is None or float(r @ r) < best[0]:
                best = (float(r @ r), float(tau), float(coef[1]))
        d = linear_drift(t.tolist(), p.tolist())
        assert d is not None and best is not None
        assert d.tau == best[1]
        assert d.slope == pytest.approx(best[2], rel=1e-9, abs=1e-12)


def test_the_leak_slope_is_the_least_squares_slope_in_constant_memory() -> None:
    """OnlineSlope against numpy's batch least-squares fit (numpy.polyfit, an outside reference)."""
    import numpy as np

    from pycnoctl.controller.maths.cycle import OnlineSlope

    rng = np.random.default_rng(3)
    t = 1e5 + np.arange(200_000) * 0.1  # a long hold, late in a long run (large, offset times)
    p = 130_000.0 - 0.013 * (t - t[0]) + rng.normal(0.0, 20.0, t.size)
    acc = OnlineSlope()
    for a, b in zip(t.tolist(), p.tolist(), strict=True):
        acc.add(a, b)
    assert acc.slope == pytest.approx(np.polyfit(t - t[0], p, 1)[0], rel=1e-9)
    assert math.isnan(OnlineSlope().slope)
    one = OnlineSlope()
    one.add(1.0, 2.0)
    assert math.isnan(one.slope)


def test_a_settle_slower_than_three_windows_is_budgeted_for_its_own_time_constant() -> None:
    """P1 relaxing with 60 s under a 0.4 Pa/s drift limit and a 2 s window: the limit passes with
    |dP/dt| tau = 24 Pa still to come (an exponential's remainder is its slope times its time constant:
    common practice), where three windows (6 s) would bound 2.4 Pa.  The budget takes the settle's own
    time constant, from the fit of its last two thirds, for the window's slope."""
    crit = SettleCriteria(window=2.0, max_drift=0.4, min_time=1.0, max_time=600.0, extrapolate=False, u_p=1.0)
    meter = CycleMeasurer(plan(filled=crit))
    f = Feeder(meter)
    f.hold("vent", 0.0, 1.0)
    assert f.hold("baseline", 0.0, 10.0)[-1] is SettleStatus.SETTLED
    f.hold("fill", 5.0e4, 0.5)
    p_inf, amp, tau = 1.0e5, 300.0, 60.0
    t0 = f.t
    status = None
    while status is not SettleStatus.SETTLED and f.t - t0 < 600.0:
        f.t += 0.1
        status = meter.feed("settle_filled", Row(f.t, p_inf + amp * math.exp(-(f.t - t0) / tau), PA, 295.0))
    assert status is SettleStatus.SETTLED
    cyc = meter.current
    assert cyc is not None
    left = cyc.p1_gauge_pa - p_inf  # what the relaxation had still to move when P1 was taken
    assert left > 10.0  # the limit passed with a good part of the relaxation to come
    assert math.sqrt(3.0) * cyc.u_p1_relax_pa >= left, (left, cyc.u_p1_relax_pa)  # the bound holds it


#: a window of one and a half sample periods: it never holds the three samples a slope's standard error needs
SHORT = SettleCriteria(window=0.15, max_drift=1.0, min_time=1.0, max_time=5.0, extrapolate=False)


def test_give_up_refuses_a_settle_whose_window_never_held_three_samples() -> None:
    """on_timeout: accept must not take a pressure the drift test never judged: with two samples in the
    window the regression gives a value but no standard error, and it was taken with a regression u of 0."""
    meter = CycleMeasurer(plan(filled=SHORT))
    f = Feeder(meter)
    f.hold("vent", 0.0, 1.0)
    f.hold("baseline", 0.0, 10.0)
    f.hold("fill", 5e4, 0.5)
    assert f.hold("settle_filled", 1e5, 8.0)[-1] is SettleStatus.TIMED_OUT
    assert meter.shortfall is not None and meter.shortfall.startswith("not settled: too few samples (2 in")
    assert meter.give_up() is False
    assert math.isnan(meter.cycles[0].p1_gauge_pa) and meter.cycles[0].flags == []  # no P1 taken
    assert meter.notes == ["P1 of cycle 1: " + meter.shortfall]


def test_a_short_window_settle_followed_by_its_next_step_is_not_taken() -> None:
    """Replay (analyze --sequence) of a trace under a window too short for its samples: no value without a
    standard error, and no cycle from it; the notes say why."""
    meter = CycleMeasurer(plan(filled=SHORT))
    f = Feeder(meter)
    f.hold("vent", 0.0, 1.0)
    f.hold("baseline", 0.0, 10.0)
    f.hold("fill", 5e4, 0.5)
    f.hold("settle_filled", 1e5, 3.0)  # under max_time: still waiting when the trace moves on
    f.hold("expand", 0.45e5, 0.1)
    f.hold("settle_expanded", 0.45e5, 10.0)
    f.hold("vent", 0.0, 0.5)
    assert meter.results == []
    assert meter.notes == ["P1 of cycle 1: not settled: too few samples (2 in the 0.15 s window; the drift "
                           "test needs at least 3)"]
