"""The drift rules' hold grows with the time a settle took to get quiet (settle.HOLD_SHARE), so the level
top of a rise that falls again is not taken for a settled pressure.

The shape: after an expansion the cell's gas warms (the pressure rises) while the gas pushed into the
expansion volume cools (it falls); with time constants of 40 s and 80 s (of the order of the slow
thermal benches this project simulates) the pressure rises about 500 Pa, stays level for several
seconds around 50 s and falls 530 Pa over the next minutes. 8 Pa of noise per 0.1 s sample, the
shipped 10 s window and 0.5 Pa/s limit. Before the hold grew, 18 of 40 noise realisations settled on
the top, 534 Pa from the pressure the gas came to."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pycnoctl.controller.maths import settle
from pycnoctl.controller.maths.settle import SettleCriteria, SettleDetector, SettleStatus

NOISE = 8.0


def top(t: float) -> float:
    return 38000.0 - 1868.0 * math.exp(-t / 40.0) + 2000.0 * math.exp(-t / 80.0)


def _decide(f, seed: int) -> tuple[float, float]:
    """(decision time s, error of the estimate against f at 600 s, Pa); (inf, nan) on a time-out."""
    rng = np.random.default_rng(seed)
    det = SettleDetector(SettleCriteria(window=10.0, max_drift=0.5, min_time=5.0, max_time=600.0,
                                        extrapolate=False, u_p=NOISE), 0.0)
    for k in range(1, 6000):
        t = k * 0.1
        status = det.feed(t, f(t) + rng.normal(0.0, NOISE))
        if status is SettleStatus.SETTLED:
            assert det.decided_at is not None
            return det.decided_at, det.estimate - f(600.0)
        if status is SettleStatus.TIMED_OUT:
            break
    return math.inf, math.nan


def test_the_level_top_of_a_rise_that_falls_again_is_not_taken():
    got = [_decide(top, seed) for seed in range(40)]
    assert all(math.isfinite(t) for t, _ in got), "a settle timed out"
    assert min(t for t, _ in got) > 120.0  # the top is at 40-70 s; the fall is steep until about 200 s
    assert max(abs(e) for _, e in got) < 60.0  # the drift rule's own remainder: slope x tau, 0.5 x 80 s


def test_the_top_fooled_the_half_window_hold(monkeypatch: pytest.MonkeyPatch):
    # the same cases with the hold as it was: the test above can fail
    monkeypatch.setattr(settle, "HOLD_SHARE", 0.0)
    got = [_decide(top, seed) for seed in range(40)]
    assert sum(1 for t, _ in got if t < 120.0) >= 5


@pytest.mark.parametrize("tau", [0.5, 1.0, 1.5])
def test_a_gas_quiet_within_two_and_a_half_windows_keeps_the_stated_hold(tau, monkeypatch: pytest.MonkeyPatch):
    # 1 kPa relaxing with tau up to 1.5 s is under the limit within 25 s: 0.2 x 25 s is the stated hold
    def f(t: float) -> float:
        return 130e3 + 1e3 * math.exp(-t / tau)

    grown = [_decide(f, seed)[0] for seed in range(10)]
    monkeypatch.setattr(settle, "HOLD_SHARE", 0.0)
    stated = [_decide(f, seed)[0] for seed in range(10)]
    assert max(abs(a - b) for a, b in zip(grown, stated, strict=True)) <= 0.5
