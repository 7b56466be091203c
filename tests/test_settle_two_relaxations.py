"""The remainder rule on a settle of two relaxations.

After an expansion into a volume whose gas relaxes more slowly than the cell's, the pressure rises
while the cell's gas warms and falls while the expansion volume's gas cools (two exponentials of
opposite sign: the textbook thermal relaxation of each chamber, common practice).  Where one
exponential leaves a misfit the noise does not explain, the rule fits two and waits until their sum
still to come is under its limit.  The synthetic shape has its asymptote known exactly.
"""

from __future__ import annotations

import math

import numpy as np

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
