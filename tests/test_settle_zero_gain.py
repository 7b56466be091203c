"""The zero is read on the cell and the expansion volume together, but what is left of its relaxation
reaches the result only through the expansion volume's gas, closed off when the fill begins.

Physics (the ideal gas law, linearised; common practice for a small temperature deficit): chambers
joined at one pressure P0 whose gases lag the wall by fractions d_c and d_x of its temperature read
P0 - P0 (Vc d_c + Vx d_x) / (Vc + Vx); once the expansion volume is closed, its own gas still rises by
P0 d_x. Where the expansion volume relaxes the slower (a larger, thicker-walled vessel), nearly all of
the pair's remainder is its own, magnified by (Vc + Vx) / Vx. Decided on the pair's remainder alone, the
zero left the expansion volume up to 2.3 Pa still to rise against a stated 0.8-1.4 Pa (below); and on
the accuracy bench's 15 s thermal instrument the calibrated Vr came out low by 0.03 % more than with a
zero waited out (300 s), from that same-signed remainder."""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths.settle import SettleCriteria, SettleDetector, SettleStatus
from pycnoctl.controller.run.engine import cycle_plan

P0 = 101_325.0
VC, VX = 45e-6, 8e-6  # a large cell, a small expansion volume: the pair's remainder understates VX's 6.6 times
TAU_C, TAU_X = 4.0, 12.0  # s: the cell's gas warms back three times faster than the expansion volume's
DEFICIT = 0.05  # both gases 5 % (about 15 K) below the wall when the vent closes


def _zero(gain: float, seed: int) -> tuple[SettleDetector, float]:
    """(the zero's detector after its decision, Pa the expansion volume's own gas has still to rise)."""
    crit = SettleCriteria(window=10.0, max_drift=None, min_time=5.0, max_time=600.0, extrapolate=False,
                          u_p=1.0, max_remainder=2.0, remainder_gain=gain)
    det = SettleDetector(crit, 0.0)
    rng = np.random.default_rng(seed)
    t, status = 0.0, SettleStatus.WAITING
    while status is SettleStatus.WAITING:
        t = round(t + 0.1, 10)
        pair = -P0 * DEFICIT * (VC * math.exp(-t / TAU_C) + VX * math.exp(-t / TAU_X)) / (VC + VX)
        status = det.feed(t, pair + rng.normal(0.0, 1.0))
    assert status is SettleStatus.SETTLED
    return det, P0 * DEFICIT * math.exp(-t / TAU_X)


def test_the_zeros_stated_remainder_bounds_what_the_expansion_volume_still_holds() -> None:
    gain = (VC + VX) / VX
    for seed in range(6):
        det, still = _zero(gain, seed)
        assert still <= det.remainder_bound, (seed, still, det.remainder_bound)
        assert det.elapsed < 150.0  # the fitted relaxation is waited down, not a noise floor: no hang


def test_without_the_gain_the_pairs_remainder_understates_the_expansion_volumes() -> None:
    """The premise of the test above: the pair's own remainder is not a bound on it."""
    broken = 0
    for seed in range(6):
        det, still = _zero(1.0, seed)
        broken += still > det.remainder_bound
    assert broken >= 3


def test_the_plan_gives_the_zero_the_gain_of_the_expansion_volume_in_use() -> None:
    settle = SimpleNamespace(window=10.0, max_drift="auto", max_remainder=2.0, min_time=5.0, max_time=600.0,
                             extrapolate=False)
    seq = SimpleNamespace(settle_baseline=settle, settle_filled=settle, settle_expanded=settle,
                          cycles=SimpleNamespace(discard=1))
    plan = cycle_plan(seq, chambers=ChamberCalibration(12e-6, 8e-6), gas="helium", u_p=8.0, u_t=0.01,
                      volume_name="small")
    assert plan.baseline.remainder_gain == pytest.approx(20.0 / 8.0)
    assert plan.filled.remainder_gain == plan.expanded.remainder_gain == 1.0


def test_a_gain_below_one_is_refused() -> None:
    with pytest.raises(ValueError, match="remainder_gain"):
        SettleCriteria(window=10.0, max_drift=None, min_time=5.0, max_time=60.0, extrapolate=False, u_p=1.0,
                       max_remainder=2.0, remainder_gain=0.5)
