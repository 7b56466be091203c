"""The gas temperature of a settled value is the wall's, read through the thermometer's line.

A settled gas is at its wall's temperature, and the thermometer reads the wall: so each settled value
(zero, P1, P2) takes the wall line's value at its last sample - a least-squares line through the last
WALL_SPAN of readings - with the uncertainty of that line's end, not the mean of the settle's last few
readings. The reference for the line's uncertainty is ordinary least squares (the prediction variance
of a fitted straight line, any regression textbook), checked here against numpy.polyfit by Monte Carlo.
The 0.01 K reading noise is the accuracy bench's thermometer (an invented instrument)."""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths.cycle import WALL_SPAN, CycleMeasurer, CyclePlan, Row, SlidingLine
from pycnoctl.controller.maths.settle import SettleCriteria, SettleStatus

WALL = 295.15
U_T = 0.01  # K per reading
CRIT = SettleCriteria(window=10.0, max_drift=0.5, min_time=3.0, max_time=60.0, extrapolate=False)


@pytest.mark.parametrize("hold", [1, 10], ids=["a reading per row", "a reading held for ten rows"])
def test_equivalent_readings_give_the_scatter_of_the_lines_end(hold: int) -> None:
    # 150 s of rows 0.1 s apart with a 6 s gap (a fill) 20 s before the end; the line at the last row
    # over the last WALL_SPAN. Its scatter over realisations is one reading's noise / sqrt(equivalent)
    rng = np.random.default_rng(3)
    times = [round(k * 0.1, 10) for k in range(1500) if not 1240 <= k < 1300]
    ends, batch, n_eq = [], [], math.nan
    for _ in range(600):
        line = SlidingLine(WALL_SPAN)
        kept: list[tuple[float, float]] = []
        reading = math.nan
        for i, t in enumerate(times):
            if i % hold == 0:
                reading = WALL + rng.normal(0.0, U_T)
            line.add(t, reading)
            kept.append((t, reading))
        t_end = times[-1]
        ends.append(line.at(t_end))
        n_eq = line.equivalent_readings(t_end)
        span = [(t, a) for t, a in kept if t >= t_end - WALL_SPAN]
        coef = np.polyfit([t - t_end for t, _ in span], [a for _, a in span], 1)
        batch.append(float(coef[1]))
    assert ends == pytest.approx(batch, abs=1e-9)  # the running line is the batch least-squares line
    predicted = U_T / math.sqrt(n_eq)
    assert statistics.stdev(ends) == pytest.approx(predicted, rel=0.1)
    # a row per reading: about a quarter of the 1,140 readings (a line's end is four times a mean's
    # variance); held readings count once
    assert n_eq == pytest.approx(1140 / 4 / hold, rel=0.15)


def _cycles(wall, *, n: int, seed: int) -> tuple[CycleMeasurer, list[float]]:
    """n cycles of a cell relaxing with tau 2 s after each valve event; the thermometer reads ``wall(t)``
    with 0.01 K of noise on every row. Returns the measurer and the times P1 was taken."""
    plan = CyclePlan(baseline=CRIT, filled=CRIT, expanded=CRIT, chambers=ChamberCalibration(12e-6, 8e-6),
                     gas="helium", u_p=1.0, u_t=U_T, discard=0)
    m = CycleMeasurer(plan)
    rng = np.random.default_rng(seed)
    t = 0.0
    taken: list[float] = []

    def run(state: str, gauge, seconds: float) -> None:
        nonlocal t
        t0 = t
        for _ in range(round(seconds / 0.1)):
            t = round(t + 0.1, 10)
            status = m.feed(state, Row(t, gauge(t - t0), 101325.0, wall(t) + rng.normal(0.0, U_T)))
            if status is SettleStatus.SETTLED:
                if state == "settle_filled":
                    taken.append(t)
                return

    for _ in range(n):
        run("vent", lambda x: 0.0, 15.0)
        run("baseline", lambda x: 0.0, 60.0)
        run("fill", lambda x: 2e4 * x, 5.0)
        run("settle_filled", lambda x: 1.3e5 + 2e3 * math.exp(-x / 2.0), 60.0)
        run("expand", lambda x: 6e4, 0.1)
        run("settle_expanded", lambda x: 6e4 - 1e3 * math.exp(-x / 2.0), 60.0)
    run("vent", lambda x: 0.0, 1.0)
    assert len(m.results) == n and len(taken) == n, "a cycle did not complete"
    return m, taken


def test_settled_temperatures_scatter_as_stated_and_far_less_than_a_mean_of_twenty_readings() -> None:
    m, _ = _cycles(lambda t: WALL, n=40, seed=11)
    t1 = [r.t1_k for r in m.results]
    t2 = [r.t2_k for r in m.results]
    stated = statistics.mean(r.u_t1_k for r in m.results)
    sd = statistics.stdev(t1 + t2)
    # the mean of a settle's last 20 readings scatters by 0.01 / sqrt(20) = 0.0022 K: the line by under half
    assert sd < 0.5 * U_T / math.sqrt(20)
    # and the stated u of each (the budget's u_t1, u_t2) is that scatter: within the Monte Carlo's
    # sampling error (80 values, about 8 %), the settles' lines overlapping as they do
    assert sd == pytest.approx(stated, rel=0.25)
    assert statistics.mean(t1) == pytest.approx(WALL, abs=3 * sd / math.sqrt(len(t1)) + 1e-6)


def test_two_values_of_one_line_are_correlated_as_their_weights_say() -> None:
    # the wall line taken at 100 s and again at 130 s (a P1 and its P2): they share the readings of
    # 10-100 s. The weights reproduce the line's value, and their correlation is the one a Monte Carlo
    # of white reading noise shows (GUM Supplement 1's method; 2,000 realisations, sampling error 0.02)
    rng = np.random.default_rng(8)
    times = [round(k * 0.1, 10) for k in range(1, 1301)]
    first, second = [], []
    w1 = w2 = None
    for _ in range(2000):
        line = SlidingLine(WALL_SPAN)
        noise = rng.normal(0.0, U_T, len(times))
        for i, t in enumerate(times):
            line.add(t, WALL + noise[i])
            if t == 100.0:
                w1 = line.weights(t)
                first.append(line.at(t))
                assert sum(w * WALL + w * noise[w1.first - 1 + j] for j, w in enumerate(w1.weights)) == \
                    pytest.approx(first[-1], abs=1e-9)
        w2 = line.weights(times[-1])
        second.append(line.at(times[-1]))
    assert w1 is not None and w2 is not None
    observed = float(np.corrcoef(first, second)[0, 1])
    assert w1.correlation(w2) == pytest.approx(observed, abs=0.05)
    assert 0.2 < observed < 0.9  # the premise: correlated, not nearly independent or identical
    assert w1.correlation(w1) == pytest.approx(1.0)


def test_a_cycles_stated_random_u_is_the_scatter_its_temperatures_give() -> None:
    # noise-free pressures and a thermometer with 0.01 K of noise per reading on a steady wall: every
    # cycle's scatter comes from its three temperatures, values of one line a minute or two apart. Treated
    # as independent they over-stated the random u by 1.2-1.4 (9c7da0a); with the correlations of their
    # shared readings it is the observed scatter, within the sampling error of 150 cycles (about 6 %)
    results = [r for seed in (5, 6, 7) for r in _cycles(lambda t: WALL, n=50, seed=seed)[0].results]
    sd = statistics.stdev(r.volume_m3 for r in results)
    stated = statistics.mean(r.u_random_m3 for r in results)
    assert 0.85 < stated / sd < 1.15
    assert all(0.2 < r.r_t1_t2 < 0.9 for r in results)  # P1 and P2 share readings


def test_a_drifting_wall_is_followed_without_lag() -> None:
    # 1 K/h (a lab warming fast): each settled temperature is the wall's at the settle's last sample,
    # not the mean of its span (a 120 s mean would lag by 60 s, 0.017 K)
    rate = 1.0 / 3600.0
    m, taken = _cycles(lambda t: WALL + rate * t, n=6, seed=2)
    for r, t in zip(m.results, taken, strict=True):
        assert r.t1_k == pytest.approx(WALL + rate * t, abs=4 * r.u_t1_k)
        assert 4 * r.u_t1_k < 0.017


def test_a_thermometer_that_stops_answering_gives_no_temperature_not_a_stretched_line() -> None:
    # valid readings for the first cycle, none after: the later cycles' temperatures are unknown (as
    # with no thermometer), not the first cycle's line extended over minutes
    m, _ = _cycles(lambda t: WALL + 0.5 if t < 100.0 else math.nan, n=3, seed=4)
    assert m.results[0].ta_k is not None
    assert all(r.t1_k is None and r.t2_k is None for r in m.results[1:])


def _one_cycle_remainder_rule(seed: int, *, u_t: float, hold: int, resolution: float, rate: float = 0.0
                              ) -> dict[str, tuple[float, SettleStatus]]:
    """A zero, P1 and P2 under the remainder rule (2 Pa) on a gas that follows its wall (1 Pa of pressure
    noise); the thermometer reads the wall (``rate`` K/s) with ``u_t`` of noise, a reading held for ``hold``
    rows and rounded to ``resolution``. Returns how long each settle took and how it ended."""
    crit = SettleCriteria(window=10.0, max_drift=None, max_remainder=2.0, min_time=5.0, max_time=300.0,
                          extrapolate=False, u_p=1.0)
    plan = CyclePlan(baseline=crit, filled=crit, expanded=crit, chambers=ChamberCalibration(12e-6, 8e-6),
                     gas="nitrogen", u_p=1.0, u_t=u_t, discard=0)
    m = CycleMeasurer(plan)
    rng = np.random.default_rng(seed)
    t, k, reading = 0.0, 0, WALL
    took: dict[str, tuple[float, SettleStatus]] = {}

    def run(state: str, absolute, seconds: float) -> None:
        nonlocal t, k, reading
        t0 = t
        for _ in range(round(seconds / 0.1)):
            t, k = round(t + 0.1, 10), k + 1
            wall = WALL + rate * t
            if k % hold == 0:
                reading = wall + rng.normal(0.0, u_t)
                reading = round(reading / resolution) * resolution if resolution else reading
            gauge = absolute(t - t0) * wall / WALL - 101325.0  # a shut gas follows its wall
            status = m.feed(state, Row(t, gauge + rng.normal(0.0, 1.0), 101325.0, reading))
            if status is not None and status is not SettleStatus.WAITING:
                took[state] = (t - t0, status)
                return

    run("vent", lambda x: 101325.0, 150.0)
    run("baseline", lambda x: 101325.0, 300.0)
    run("fill", lambda x: 101325.0 + 2e4 * x, 5.0)
    run("settle_filled", lambda x: 231325.0 + 2e3 * math.exp(-x / 2.0), 300.0)
    run("expand", lambda x: 161325.0, 0.1)
    run("settle_expanded", lambda x: 161325.0 - 1e3 * math.exp(-x / 2.0), 300.0)
    return took


@pytest.mark.parametrize("seed", range(4))
def test_a_noisy_coarse_thermometer_on_a_steady_wall_does_not_hold_the_settles_up(seed: int) -> None:
    # a 1 Hz thermometer with 0.03 K of noise, read to 0.01 K (an invented cheap sensor): a line through
    # its last 120 s wanders by about 0.005 K, 4 Pa of a 2.3 bar absolute pressure over tens of seconds.
    # A settle that followed that line saw a drift the gas does not have and timed out at 300 s; the
    # wall is steady within what the thermometer resolves, so the settles are left alone (common practice:
    # correct only what the sensor resolves)
    took = _one_cycle_remainder_rule(seed, u_t=0.03, hold=10, resolution=0.01)
    assert set(took) == {"baseline", "settle_filled", "settle_expanded"}
    assert all(status is SettleStatus.SETTLED and s < 60.0 for s, status in took.values()), took


def test_a_wall_the_thermometer_resolves_moving_is_still_followed() -> None:
    # the lab warming 1 K/h under a 10 Hz, 0.01 K thermometer: a shut gas's pressure rises with it, about
    # 0.2 Pa/s at 2.3 bar, which three windows of the remainder rule's slope bound take for 6 Pa of
    # relaxation still to come. Followed, the settles decide as on a steady wall
    took = _one_cycle_remainder_rule(1, u_t=0.01, hold=1, resolution=0.0, rate=1.0 / 3600.0)
    assert all(status is SettleStatus.SETTLED and s < 60.0 for s, status in took.values()), took
