"""The budget counts each random input once and keeps systematic parts out of the average.

References: JCGM 100:2008 (GUM) 5.1-5.2 for the propagation and 4.2 for a mean of n readings
(u/sqrt(n)); the chi-square test of an observed variance against a predicted one is the standard
one (scipy.stats.chi2); a Monte Carlo of the same inputs (JCGM 101:2008) checks the run budget.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import chi2

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths import uncertainty
from pycnoctl.controller.maths.calibration import CalibrationRun, fit_calibration
from pycnoctl.controller.maths.cycle import CycleData
from pycnoctl.controller.maths.results import cycle_result, run_result
from pycnoctl.controller.maths.volume import sample_volume

PA = 101325.0
VC, VR = 12e-6, 8e-6
CAL = ChamberCalibration(VC, VR, ((1e-20, 0.0), (0.0, 1e-20)))


def _cycle(index: int, p1g: float = 1.3e5, vs: float = 5e-6, **kw: float) -> CycleData:
    vg = VC - vs
    p2g = p1g * vg / (vg + VR)  # ideal gas, sample_first
    base = dict(index=index, volume_name="small", baseline_pa=0.0, u_baseline_pa=0.3, ambient_pa=PA,
                ta_k=295.15, n_ta=4, p1_gauge_pa=p1g, u_p1_settle_pa=1.5, t1_k=295.15, n_t1=4,
                p2_gauge_pa=p2g, u_p2_settle_pa=1.2, t2_k=295.15, n_t2=4)
    base.update(kw)
    return CycleData(**base)  # type: ignore[arg-type]


def _rows(budget: uncertainty.Budget, name: str) -> list[uncertainty.Contribution]:
    return [c for c in budget.contributions if c.name == name]


def test_settled_pressure_noise_is_not_added_twice() -> None:
    # The settle window's regression SE already carries the transducer's white noise: the random
    # P1 row is that SE alone, whatever the per-reading noise of the instrument is.
    r = cycle_result(_cycle(1), CAL, gas="ideal", u_p_sys=0.0, u_t=0.05, discard=0)
    (p1,) = _rows(r.budget, "fill pressure P1")
    assert p1.std_u == pytest.approx(1.5) and p1.random and p1.evaluation == "A"
    assert r.u_p1_pa == pytest.approx(1.5)
    assert not _rows(r.budget, "fill pressure P1, systematic")  # nothing systematic was stated


def test_temperature_mean_of_n_readings_has_its_own_standard_error() -> None:
    # GUM 4.2.3: the mean of n independent readings of noise s has u = s / sqrt(n)
    r = cycle_result(_cycle(1, n_t1=16, n_t2=4, n_ta=1), CAL, gas="ideal", u_p_sys=0.0, u_t=0.04, discard=0)
    (t1,) = _rows(r.budget, "temperature T1")
    (t2,) = _rows(r.budget, "temperature T2")
    (ta,) = _rows(r.budget, "temperature Ta")
    assert (t1.std_u, t2.std_u, ta.std_u) == (pytest.approx(0.01), pytest.approx(0.02), pytest.approx(0.04))


def test_systematic_rows_enter_the_run_mean_once() -> None:
    # n cycles with the same budget: the random part averages (u_r^2 / n), the calibration and the
    # transducer's non-linearity do not (GUM 5.2: fully correlated between the cycles).
    n = 9
    cycles = [cycle_result(_cycle(i), CAL, gas="ideal", u_p_sys=4.0, u_t=0.05, discard=0) for i in range(1, n + 1)]
    b0 = cycles[0].budget
    rand = b0.random_variance
    sys_var = b0.combined**2 - rand
    assert sys_var > 0 and any(c.name == "fill pressure P1, systematic" and not c.random for c in b0.contributions)
    run = uncertainty.combine_run([c.volume_m3 for c in cycles], [c.budget for c in cycles])
    # identical cycles: no scatter, so the predicted random part is used
    assert run.combined**2 == pytest.approx(rand / n + sys_var, rel=1e-9)
    # the old way (everything non-calibration divided by n) would be smaller by the transducer's part
    cal_var = b0.variance_of("calibration")
    assert run.combined**2 > (b0.combined**2 - cal_var) / n + cal_var


def test_run_budget_against_a_monte_carlo_of_its_inputs() -> None:
    # JCGM 101:2008: draw the inputs (a systematic P1/P2 error common to the run, fresh noise per
    # cycle), compute each run's mean volume; its SD must match the run budget's combined u.
    rng = np.random.default_rng(7)
    n, runs = 6, 4000
    u1, u2, us = 1.5, 1.2, 5.0
    p1g = 1.3e5
    vs = 5e-6
    p2g = p1g * (VC - vs) / (VC - vs + VR)
    means = np.empty(runs)
    for k in range(runs):
        e1, e2 = rng.normal(0, us, 2)  # the transducer's non-linearity: the same in every cycle of a run
        v = [sample_volume(PA + p1g + e1 + rng.normal(0, u1), PA + p2g + e2 + rng.normal(0, u2), PA, VC, VR,
                           gas="ideal") for _ in range(n)]
        means[k] = np.mean(v)
    cycles = [cycle_result(_cycle(i, u_p1_settle_pa=u1, u_p2_settle_pa=u2, u_baseline_pa=0.0), CAL, gas="ideal",
                           u_p_sys=us, u_t=0.0, discard=0) for i in range(1, n + 1)]
    cal_var = cycles[0].budget.variance_of("calibration")
    run = uncertainty.combine_run([c.volume_m3 for c in cycles], [c.budget for c in cycles])
    assert math.sqrt(run.combined**2 - cal_var) == pytest.approx(float(means.std(ddof=1)), rel=0.05)


def test_scatter_test_flags_both_ways_with_chi_square() -> None:
    rng = np.random.default_rng(3)
    sigma = 1e-9
    wide = list(1e-6 + rng.normal(0, 3 * sigma, 12))
    check = uncertainty.scatter_check(wide, sigma)
    stat = 11 * (np.std(wide, ddof=1) / sigma) ** 2
    assert check.p_above == pytest.approx(chi2.sf(stat, 11)) and check.verdict == "above"
    assert "scatter" in check.note()
    narrow = list(1e-6 + rng.normal(0, 0.2 * sigma, 12))
    assert uncertainty.scatter_check(narrow, sigma).verdict == "below"
    fair = list(1e-6 + rng.normal(0, sigma, 12))
    assert uncertainty.scatter_check(fair, sigma).verdict == "consistent"


def test_run_result_reports_type_a_b_and_a_birge_ratio() -> None:
    data = [_cycle(i) for i in range(1, 7)]
    for i, c in enumerate(data):
        c.p2_gauge_pa += 40.0 * (-1) ** i  # a scatter well above the 1.2 Pa the settles state
    cycles = [cycle_result(c, CAL, gas="ideal", u_p_sys=2.0, u_t=0.05, discard=0) for c in data]
    res = run_result(cycles)
    assert res is not None and res.birge_ratio is not None
    assert res.u_type_a_m3 > 0 and res.u_type_b_m3 > 0
    assert res.u_volume_m3**2 == pytest.approx(res.u_type_a_m3**2 + res.u_type_b_m3**2, rel=1e-9)
    rows = res.as_dict()["budget"]
    assert {r["evaluation"] for r in rows} <= {"A", "B"} and any(not r["random"] for r in rows)


def test_lab_pressure_change_corrected_with_a_barometer_budgeted_without() -> None:
    # The gas in the expansion volume stays at the zero's lab pressure; a lab 30 Pa higher by P2
    # changes P2 - Pa by 30 Pa. With the barometer's reading the volume comes out as without the change.
    still = cycle_result(_cycle(1), CAL, gas="ideal", u_p_sys=0.0, u_t=0.0, discard=0, barometer=True)
    moved = _cycle(1, ambient1_pa=PA + 30.0, ambient2_pa=PA + 30.0, since_zero1_s=40.0, since_zero2_s=80.0)
    moved.p1_gauge_pa -= 30.0  # the gauge reads 30 Pa less against the higher lab pressure
    moved.p2_gauge_pa -= 30.0
    corrected = cycle_result(moved, CAL, gas="ideal", u_p_sys=0.0, u_t=0.0, discard=0, barometer=True)
    assert corrected.volume_m3 == pytest.approx(still.volume_m3, rel=1e-12)
    blind = cycle_result(moved, CAL, gas="ideal", u_p_sys=0.0, u_t=0.0, discard=0, ambient_drift_rate=0.5)
    assert abs(blind.volume_m3 / still.volume_m3 - 1) > 1e-4  # the error the correction removes
    (row,) = _rows(blind.budget, "expansion pressure P2, systematic")
    assert row.std_u == pytest.approx(0.5 * 80.0 / math.sqrt(3.0)) and not row.random


def test_calibration_fit_far_too_good_is_flagged() -> None:
    # Points exactly on the line with generous stated noise: chi-square near zero, below its lower
    # 1 % quantile -> the stated noise is overstated (two-sided residual test).
    runs = []
    for i, v in enumerate([0.0, 0.0, 0.0, 2e-6, 2e-6, 2e-6, 4e-6, 4e-6, 4e-6]):
        vg = VC - v
        p1 = PA + 1.3e5
        p2 = PA + 1.3e5 * vg / (vg + VR)
        runs.append(CalibrationRun(p1, p2, PA, v, u_p=50.0, u_inserted=1e-10 if v else 0.0, group=i // 3))
    fit = fit_calibration(runs, gas="ideal")
    assert fit.consistent() and fit.too_good()
    noise = np.random.default_rng(1).normal(0, 50, (9, 2))  # the noise the points state, on P1 and P2
    noisy = [CalibrationRun(r.p1 + n1, r.p2 + n2, r.pa, r.inserted_volume, u_p=50.0, u_inserted=r.u_inserted,
                            group=r.group) for r, (n1, n2) in zip(runs, noise, strict=True)]
    assert not fit_calibration(noisy, gas="ideal").too_good()


def test_a_measurement_settling_by_other_rules_than_its_calibration_is_warned(tmp_path) -> None:
    # common practice: calibrate and measure with the same cycle, or the settle bias no longer cancels
    import yaml

    from pycnoctl.controller.jobs.calibration_use import settle_mismatch, settle_rules
    from pycnoctl.controller.record.catalog import CalibrationRecord
    from pycnoctl.controller.run.sequence import load_sequence, resolve_sequence

    seq = load_sequence(resolve_sequence("grain-volume"))
    rec = CalibrationRecord(expansion_volume="small", gas="helium", vc=VC, vr=VR, fill_pressure=1.3e5,
                            temperature=295.15, payload={"settle_rules": settle_rules(seq)}, id="CAL-1")
    assert settle_mismatch(rec, seq) == []
    data = yaml.safe_load(resolve_sequence("grain-volume").read_text())
    data["settle"]["window"] = "20 s"
    path = tmp_path / "other.yaml"
    path.write_text(yaml.safe_dump(data))
    (warning,) = settle_mismatch(rec, load_sequence(path))
    assert "CAL-1" in warning and "window" in warning
    assert settle_mismatch(CalibrationRecord(expansion_volume="small", gas="helium", vc=VC, vr=VR,
                                             fill_pressure=1.3e5, temperature=295.15), seq) == []  # older record
