"""A settle decided on the slope bound, where a relaxation is still under way at the noise floor.

The remainder rule falls back on |slope| x tau where no exponential is resolved.  Under noise that
bound wanders; the rule decides the first time it dips under its limit, so the bound read then is the
luckiest of many looks.  A synthetic slow relaxation (invented: 15 Pa relaxing with 30 s under 10 Pa of
white noise, the end known exactly), 40 noise draws.

Kept as a known shortfall (strict xfail, so a fix shows): 30 of the 37 settles decided on the slope
bound end beyond the bound they state.  Adding two standard errors of the window's slope times the
same tau to the stated bound (as a fit's bound carries two of its amplitude) brought that to 1 of 37,
but raised U on the accuracy bench by 30-94 % (he-half 0.048 -> 0.062 %, n2-absolute 0.110 -> 0.213 %)
where every run was already within U: there the slope bound decides on gas that has truly settled.
Not kept; the run's own scatter test is what covers an instrument where this happens every cycle.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from pycnoctl.controller.maths.cycle import settle_model
from pycnoctl.controller.maths.settle import SettleCriteria, SettleDetector, SettleStatus


def _settles(amp: float, tau: float, noise: float, draws: int = 40) -> list[tuple[float, float, str]]:
    """(error of the settled value against the end, the stated bound, the model) per noise draw."""
    out = []
    for seed in range(draws):
        crit = SettleCriteria(window=10.0, max_drift=None, min_time=5.0, max_time=600.0, extrapolate=False,
                              u_p=noise, max_remainder=2.0)
        det = SettleDetector(crit, 0.0)
        rng = np.random.default_rng(seed)
        t, status = 0.0, SettleStatus.WAITING
        while status is SettleStatus.WAITING:
            t = round(t + 0.1, 10)
            status = det.feed(t, amp * math.exp(-t / tau) + rng.normal(0.0, noise))
        assert status is SettleStatus.SETTLED
        out.append((det.estimate, det.remainder_bound, settle_model(det)))
    return out


@pytest.mark.xfail(strict=True, reason="known shortfall: the slope bound states the luckiest look (30 of 37 "
                   "settles beyond it); see the module docstring")
def test_slope_bound_decisions_hold_their_error_within_the_stated_bound() -> None:
    runs = _settles(15.0, 30.0, 10.0)
    on_slope = [(e, b) for e, b, model in runs if model == "slope bound"]
    assert len(on_slope) >= 20  # the premise: this relaxation is decided on the slope bound
    beyond = sum(abs(e) > b for e, b in on_slope)
    assert beyond <= 0.1 * len(on_slope), (beyond, len(on_slope))  # a two-standard-error bound: ~1 in 20
