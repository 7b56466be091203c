"""The standard error a settled pressure states, against the scatter of the values taken.

A settle's value is a least-squares line's end over its window (or a fit's at the last sample), and
its stated u the regression's standard error: the prediction variance of a fitted straight line (any
regression textbook), here against a Monte Carlo of white noise on still gas (invented: 6 Pa of noise,
10 Hz, the remainder rule at 2 Pa as the shipped sequences use it).

Read at a fixed time the two agree. Read where the rule decides, the values scatter less than stated:
the rule stops the first time the window looks still, which picks realisations whose line is flat
near its end, and the line's end then carries less of its slope's noise than the unconditional
standard error counts. Kept as a known shortfall (strict xfail, so a fix shows): it over-states a
cycle's random u by about 1.1-1.2 on the accuracy bench's instruments (the stated random u / run SD
above 1.25 in 6 of 42 instrument-seeds).
"""

from __future__ import annotations

import statistics

import numpy as np
import pytest

from pycnoctl.controller.maths.settle import SettleCriteria, SettleDetector, SettleStatus

NOISE = 6.0


def _criteria(min_time: float) -> SettleCriteria:
    return SettleCriteria(window=10.0, max_drift=None, max_remainder=2.0, min_time=min_time, max_time=300.0,
                          extrapolate=False, u_p=NOISE)


def _still_gas(det: SettleDetector, rng: np.random.Generator, until: float | None) -> None:
    t = 0.0
    while until is None or t < until - 1e-9:
        t = round(t + 0.1, 10)
        status = det.feed(t, rng.normal(0.0, NOISE))
        if until is None and status is not SettleStatus.WAITING:
            return


def test_at_a_fixed_time_the_regression_states_its_scatter() -> None:
    rng = np.random.default_rng(2)
    values, stated = [], []
    for _ in range(400):
        det = SettleDetector(_criteria(min_time=100.0), 0.0)  # no decision before the reading
        _still_gas(det, rng, until=22.0)
        value, u, *_ = det._regression()
        values.append(value)
        stated.append(u)
    # 400 draws: the SD is known to about 3.5 %
    assert statistics.mean(stated) / statistics.stdev(values) == pytest.approx(1.0, abs=0.1)


@pytest.mark.xfail(strict=True, reason="known shortfall: a value taken where the rule decides scatters about "
                   "1.2 times less than its stated u (see the module docstring)")
def test_at_the_rules_decision_the_stated_u_is_the_scatter() -> None:
    rng = np.random.default_rng(1)
    values, stated = [], []
    for _ in range(400):
        det = SettleDetector(_criteria(min_time=5.0), 0.0)
        _still_gas(det, rng, until=None)
        assert det.status is SettleStatus.SETTLED
        values.append(det.estimate)
        stated.append(det.u_estimate)
    assert statistics.mean(stated) / statistics.stdev(values) == pytest.approx(1.0, abs=0.1)
