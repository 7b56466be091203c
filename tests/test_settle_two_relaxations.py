"""The remainder rule on a settle of two relaxations.

After an expansion into a volume whose gas relaxes more slowly than the cell's, the pressure rises
while the cell's gas warms and falls while the expansion volume's gas cools (two exponentials of
opposite sign: the textbook thermal relaxation of each chamber, common practice).  Where one
exponential leaves a misfit the noise does not explain, the rule fits two and waits until their sum
still to come is under its limit.  And where a fit resolves the relaxation, what it can still see must
be under ``max_remainder``, not under one reading's noise: before that, a 30 s thermal bench (8 Pa
gauge) settled 5.7 Pa short of its P2 and 7.4 Pa short of its P1, always on the same side, and its
calibrations' Vr came out low by 1.5 of their standard uncertainties on average.  The synthetic
shapes have their asymptote known exactly.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths.cycle import CycleMeasurer, CyclePlan
from pycnoctl.controller.maths.settle import SettleCriteria, SettleDetector, SettleStatus

P_INF = 27_620.0


def _rule(noise: float) -> SettleCriteria:
    return SettleCriteria(window=10.0, max_drift=None, min_time=5.0, max_time=900.0, extrapolate=False,
                          u_p=max(noise, 0.5), max_remainder=2.0)


def _settle(shape, noise: float, seed: int) -> SettleDetector:
    rng = np.random.default_rng(seed)
    det = SettleDetector(_rule(noise), 0.0)
    for i in range(1, 9002):
        t = i * 0.1
        if det.feed(t, shape(t) + (rng.normal(0.0, noise) if noise else 0.0)) is not SettleStatus.WAITING:
            break
    return det


def _turning(t: float) -> float:
    """Rises for 24 s (the cell's gas warming, 30 s), then falls (the expansion volume's, 60 s)."""
    return P_INF - 300.0 * math.exp(-t / 30.0) + 400.0 * math.exp(-t / 60.0)


def _strong_pair(t: float) -> float:
    """Both large (3 kPa each): the faster is still in view when the slower is nearly done."""
    return P_INF - 3000.0 * math.exp(-t / 30.0) + 3000.0 * math.exp(-t / 60.0)


def _slow(t: float) -> float:
    """One slow relaxation (a poorly conducting chamber after a fill): 400 Pa, 45 s."""
    return P_INF + 400.0 * math.exp(-t / 45.0)


def test_two_relaxations_are_fitted_and_the_value_is_within_what_the_rule_says_is_left() -> None:
    """Decided on the two-exponential model (before it, the slope bound decided, 11 s later)."""
    det = _settle(_strong_pair, 0.0, 0)
    assert det.status is SettleStatus.SETTLED and det.method == "fitted" and det.relaxations == 2
    error = det.estimate - P_INF  # the pressure still falls: the recorded value is above its end
    assert 0.0 <= error <= det.remainder_bound
    assert error < 2.0 + 0.5  # within the stated limit (and the fit's floor), not one reading's noise


@pytest.mark.parametrize("shape", [
    pytest.param(_turning, id="two-relaxations", marks=pytest.mark.xfail(strict=True, reason=(
        "known shortfall: at 8 Pa of noise the top of this turning point (24 s in, 130 Pa above the end) "
        "is taken for a settled gas in 4 of 12 settles: the misfit of one exponential is hidden by the "
        "noise there and the hold (a fifth of the time to quiet) ends before the fall shows"))),
    pytest.param(_slow, id="one-slow"),
])
def test_under_noise_the_settle_ends_within_the_limit_of_its_end_not_the_noise(shape) -> None:
    """8 Pa readings, 12 settles each: the mean error is held near the 2 Pa limit (it was 5-7 Pa with the
    limit at one reading's noise) and no settle ends beyond its stated bound."""
    errors, bounds = [], []
    for seed in range(12):
        det = _settle(shape, 8.0, seed)
        assert det.status is SettleStatus.SETTLED
        errors.append(det.estimate - P_INF)
        bounds.append(det.remainder_bound)
    errors_a = np.asarray(errors)
    assert float(np.mean(errors_a)) < 1.7, errors  # one slow: 2.28 Pa before, 1.18 after
    assert np.all(np.abs(errors_a) <= np.asarray(bounds) + 3.0 * 8.0 / math.sqrt(100)), (errors, bounds)


# --- the same turning point, cycle after cycle: the run's own history holds a decision far too soon ---

def _cycle_rule(noise: float) -> SettleCriteria:
    return SettleCriteria(window=10.0, max_drift=None, min_time=5.0, max_time=900.0, extrapolate=False,
                          u_p=noise, max_remainder=2.0)


def _run_of_cycles(seed: int, cycles: int = 5, noise: float = 8.0) -> list[float]:
    """P2's error against its end (Pa) in each cycle of a run whose every expansion turns like _turning;
    the zero and P1 are quick fills' relaxations (2 s) at the same noise."""
    rule = _cycle_rule(noise)
    meter = CycleMeasurer(CyclePlan(baseline=rule, filled=rule, expanded=rule,
                                    chambers=ChamberCalibration(12e-6, 8e-6), gas="helium", u_p=noise,
                                    u_t=0.01, discard=0))
    rng = np.random.default_rng(seed)
    clock = [0.0]

    def phase(state: str, shape, seconds: float) -> None:
        start = clock[0]
        for _ in range(round(seconds / 0.1)):
            clock[0] += 0.1
            p = shape(clock[0] - start) + rng.normal(0.0, noise)
            status = meter.take_sample(state, clock[0], p, 101_325.0, 295.15)
            if status is not None and status is not SettleStatus.WAITING:
                return

    for _ in range(cycles):
        phase("vent", lambda s: 0.0, 2.0)
        phase("baseline", lambda s: 40.0 * math.exp(-s / 2.0), 900.0)
        phase("fill", lambda s: 60_000.0, 1.0)
        phase("settle_filled", lambda s: 70_000.0 + 500.0 * math.exp(-s / 2.0), 900.0)
        phase("expand", lambda s: P_INF, 0.2)
        phase("settle_expanded", _turning, 900.0)
    phase("vent", lambda s: 0.0, 1.0)
    return [c.p2_gauge_pa - P_INF for c in meter.results]


def test_a_run_does_not_take_a_turning_top_once_its_cycles_know_the_phase() -> None:
    """8 runs of 5 cycles: P2 taken at the top (over 20 Pa above its end) in at most 2 of the 32 cycles
    after the first (1 measured: a run whose first cycle was itself fooled, so its history is short);
    without the run's history, 11 of 32 (the detector alone, xfail above)."""
    fooled_later = 0
    for seed in range(8):
        errors = _run_of_cycles(seed)
        assert len(errors) == 5
        fooled_later += sum(1 for e in errors[1:] if abs(e) > 20.0)
        assert all(abs(e) < 6.0 for e in errors if abs(e) <= 20.0)  # the rest end near their end
    assert fooled_later <= 2, fooled_later
