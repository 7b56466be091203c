"""A run's result from the cycles that agreed: those before them are warm-up, not a fixed count.

References: the stop rule of pharmacopoeial gas pycnometry, "repeat until consecutive volumes agree and
report their mean" (USP <699>, from memory); that the mean of normal values is independent of their
spread (a textbook property of the normal distribution, e.g. Cochran's theorem), so choosing the group
by its agreement does not bias the mean.
"""

from __future__ import annotations

import numpy as np
import pytest
from pydantic import ValidationError

from pycnoctl.controller.cli.result_view import why
from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths import stats
from pycnoctl.controller.maths.cycle import CycleData, CycleMeasurer, CyclePlan
from pycnoctl.controller.maths.results import WARM_UP, agreeing_only, cycle_result, run_result
from pycnoctl.controller.maths.settle import SettleCriteria
from pycnoctl.controller.run.sequence import Converge
from tests.measurer_feed import StateFeeder

PA = 101325.0
VC, VR = 12e-6, 8e-6
CAL = ChamberCalibration(VC, VR, ((1e-20, 0.0), (0.0, 1e-20)))


def _cycle(index: int, vs: float) -> CycleData:
    vg = VC - vs
    p1g = 1.3e5
    p2g = p1g * vg / (vg + VR)  # ideal gas, sample cell first: Boyle's law
    return CycleData(index=index, volume_name="small", baseline_pa=0.0, u_baseline_pa=0.3, ambient_pa=PA,
                     ta_k=295.15, n_ta=4, p1_gauge_pa=p1g, u_p1_settle_pa=1.5, t1_k=295.15, n_t1=4,
                     p2_gauge_pa=p2g, u_p2_settle_pa=1.2, t2_k=295.15, n_t2=4)


def _results(volumes_cm3: list[float], discard: int = 0):
    return [cycle_result(_cycle(i, v * 1e-6), CAL, gas="ideal", u_p_sys=0.0, u_t=0.0, discard=discard)
            for i, v in enumerate(volumes_cm3, start=1)]


AGREEING = Converge(last=3, within=0.001, result_from="agreeing")


def test_a_first_cycle_still_settling_in_is_left_out_once_the_next_three_agree() -> None:
    cycles = _results([5.020, 5.000, 5.002, 4.999])  # the first 0.4 % high; 2-4 within 0.1 %
    marked = agreeing_only(cycles, AGREEING)
    assert [c.kept for c in marked] == [False, True, True, True]
    assert WARM_UP in marked[0].flags and WARM_UP not in marked[1].flags
    res = run_result(marked, converge=AGREEING)
    assert res.n_kept == 3 and res.converged
    assert res.volume_m3 * 1e6 == pytest.approx(np.mean([c.volume_m3 for c in cycles[1:]]) * 1e6, abs=1e-9)
    assert res.volume_m3 * 1e6 == pytest.approx(5.0003333, abs=2e-5)  # Boyle's law gives back the volumes
    assert why(marked[0].as_dict(), 0, []) == "no (warm-up)"


def test_kept_rule_and_disagreeing_cycles_change_nothing() -> None:
    cycles = _results([5.020, 5.000, 5.002, 4.999])
    kept_rule = Converge(last=3, within=0.001)  # the default: every kept cycle
    assert kept_rule.result_from == "kept"
    assert [c.kept for c in agreeing_only(cycles, kept_rule)] == [True] * 4
    assert run_result(agreeing_only(cycles, kept_rule), converge=kept_rule).n_kept == 4
    apart = _results([5.000, 5.020, 5.000, 5.010])  # the last three do not agree within 0.1 %
    assert [c.kept for c in agreeing_only(apart, AGREEING)] == [True] * 4
    res = run_result(agreeing_only(apart, AGREEING), converge=AGREEING)
    assert res.n_kept == 4 and not res.converged


def test_a_fixed_discard_still_applies_before_the_agreeing_group() -> None:
    cycles = _results([5.100, 5.020, 5.000, 5.002, 4.999], discard=1)
    marked = agreeing_only(cycles, AGREEING)
    assert [c.kept for c in marked] == [False, False, True, True, True]
    assert WARM_UP not in marked[0].flags  # left out by the discard, not by the agreement
    assert why(marked[0].as_dict(), 1, []) == "no (warm-up)"


def test_result_from_is_checked() -> None:
    with pytest.raises(ValidationError, match="result_from"):
        Converge(last=3, result_from="sometimes")  # type: ignore[arg-type]


def test_the_stop_rule_s_agreeing_group_has_an_unbiased_mean_for_normal_cycles() -> None:
    # The property agreeing_only rests on (it is not called here: 20 000 budgets would be slow): the
    # stop rule run on 20 000 simulated runs of normal cycles (sd 0.05 % of the volume, so the rule
    # often needs more than three): the mean of the group that agreed is centred on the truth to
    # within its Monte Carlo standard error, and far nearer than the within-bound.
    rng = np.random.default_rng(11)
    truth, sd, means = 5.0, 5.0 * 5e-4, []
    for _ in range(20_000):
        vols: list[float] = []
        while len(vols) < 8:
            vols.append(float(rng.normal(truth, sd)))
            if stats.converged(vols, last_k=3, within_fraction=0.001):
                break
        group = vols[-3:] if stats.converged(vols, last_k=3, within_fraction=0.001) else vols
        means.append(float(np.mean(group)))
    m = np.asarray(means)
    se = m.std(ddof=1) / np.sqrt(m.size)
    assert abs(m.mean() - truth) < 4 * se
    assert m.std(ddof=1) == pytest.approx(sd / np.sqrt(3), rel=0.1)  # the group's spread, not less


# --- the run's first cycle, judged late against its successors (maths.cycle.CycleMeasurer._doubt_first)

def _measured_run(first_p2_tail: float, n: int = 3, first_p2_offset: float = 0.0, noise: float = 0.0) -> list:
    """n hand-made cycles (0.1 s rows); every P2 relaxes by ``tail`` Pa with tau 1.5 s, except the first,
    which relaxes by ``first_p2_tail``: a flat first P2 decides at once, the others wait for the drift."""
    crit = SettleCriteria(window=2.0, max_drift=1.0, min_time=1.0, max_time=60.0, extrapolate=False)
    meter = CycleMeasurer(CyclePlan(baseline=crit, filled=crit, expanded=crit, chambers=CAL, gas="nitrogen",
                                    u_p=1.0, u_t=0.002, discard=0))
    hold = StateFeeder(meter, noise=noise, seed=5).hold

    for i in range(n):
        tail = first_p2_tail if i == 0 else 200.0
        offset = first_p2_offset if i == 0 else 0.0
        hold("vent", lambda s: 0.0, 1.0)
        hold("baseline", lambda s: 0.0, 4.0)
        hold("fill", lambda s: 5e4, 0.5)
        hold("settle_filled", lambda s: 1.0e5, 4.0)
        hold("expand", lambda s: 4.5e4, 0.1)
        hold("settle_expanded", lambda s, tail=tail, offset=offset: 4.5e4 + offset + tail * np.exp(-s / 1.5), 15.0)
        hold("vent", lambda s: 0.0, 0.5)
    return meter.results


def test_a_first_cycle_that_settled_far_sooner_than_its_successors_is_left_out() -> None:
    res = _measured_run(first_p2_tail=0.0)
    assert res[0].settle2_s < 0.5 * min(c.settle2_s for c in res[1:])  # the premise: decided at once
    assert [c.kept for c in res] == [False, True, True]
    assert res[0].flags[-1] == "settled in under half the later cycles' time"
    alike = _measured_run(first_p2_tail=200.0)  # relaxing as its successors do: kept
    assert [c.kept for c in alike] == [True, True, True]


def test_a_first_cycle_beyond_its_noise_from_its_successors_is_left_out() -> None:
    # 2 Pa readings; the first P2 held 40 Pa high (the gas after the purge still off the wall's
    # temperature), about 0.2 % of this volume: well beyond what its noise allows
    res = _measured_run(first_p2_tail=200.0, first_p2_offset=40.0, noise=2.0)
    assert [c.kept for c in res] == [False, True, True]
    assert res[0].flags[-1] == "beyond its noise from the later cycles: still settling in"
    alike = _measured_run(first_p2_tail=200.0, first_p2_offset=0.0, noise=2.0)
    assert [c.kept for c in alike] == [True, True, True]
