"""From measured pressures to cycle volumes and a run result: pure functions, shared by the live
engine and by ``pycnoctl analyze`` so a stored run recomputes to the same numbers.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field, fields, replace
from typing import Any, Protocol

import numpy as np

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths import stats, uncertainty
from pycnoctl.controller.maths.verdict import NOT_A_MEASUREMENT as NOT_A_MEASUREMENT
from pycnoctl.controller.maths.verdict import is_not_a_measurement as is_not_a_measurement
from pycnoctl.controller.maths.verdict import not_a_measurement as not_a_measurement
from pycnoctl.controller.maths.verdict import outside_cell
from pycnoctl.controller.maths.volume import VolumeError


class CyclePressures(Protocol):
    """What a cycle measured (maths.cycle.CycleData serves), under the result's own names: gauge
    pressures above the cycle's zero, each settle's own standard uncertainty."""

    index: int
    volume_name: str
    baseline_pa: float
    u_baseline_pa: float
    u_baseline_relax_pa: float
    ambient_pa: float
    ta_k: float
    n_ta: int
    p1_gauge_pa: float
    u_p1_settle_pa: float
    u_p1_relax_pa: float
    t1_k: float
    n_t1: int
    settle1_s: float
    drift1_pa_s: float
    p2_gauge_pa: float
    u_p2_settle_pa: float
    u_p2_relax_pa: float
    t2_k: float
    n_t2: int
    settle2_s: float
    r_t1_t2: float
    r_t1_ta: float
    r_t2_ta: float
    drift2_pa_s: float
    fill_s: float
    ambient1_pa: float
    ambient2_pa: float
    since_zero1_s: float
    since_zero2_s: float
    flags: list[str]


@dataclass
class CycleResult:
    index: int
    volume_name: str
    baseline_pa: float
    ambient_pa: float
    p1_gauge_pa: float
    p2_gauge_pa: float
    u_p1_pa: float  # random part (the settle window's regression): what a calibration fit weighs
    u_p2_pa: float
    t1_k: float | None
    t2_k: float | None
    ta_k: float | None
    volume_m3: float
    u_volume_m3: float  # combined standard uncertainty of this cycle
    kept: bool
    flags: list[str] = field(default_factory=list)
    budget: uncertainty.Budget | None = None
    settle1_s: float = math.nan
    settle2_s: float = math.nan
    drift1_pa_s: float = math.nan
    drift2_pa_s: float = math.nan
    fill_s: float = math.nan
    u_baseline_pa: float = math.nan  # random part of the zero
    u_p1_sys_pa: float = 0.0  # systematic parts: transducer non-linearity and relaxation still to come
    u_p2_sys_pa: float = 0.0
    u_baseline_relax_pa: float = 0.0  # of which the relaxation each settle left to come
    u_p1_relax_pa: float = 0.0
    u_p2_relax_pa: float = 0.0
    p1_ambient_pa: float = math.nan  # the lab pressure P1 and P2 are taken against (absolute = this + gauge)
    p2_ambient_pa: float = math.nan
    u_t1_k: float = 0.0  # random standard uncertainties of the temperatures (means of readings)
    u_t2_k: float = 0.0
    u_ta_k: float = 0.0
    r_t1_t2: float = 0.0  # correlations of the temperatures' errors (their lines share readings)
    r_t1_ta: float = 0.0
    r_t2_ta: float = 0.0
    u_random_m3: float = math.nan  # the part of u_volume_m3 that changes from cycle to cycle

    def as_dict(self) -> dict[str, Any]:
        # field by field rather than asdict(), which deep-copies the whole budget only for it to be
        # dropped: that copy was most of what a run spends when its cycles are done
        d = {f.name: getattr(self, f.name) for f in fields(self) if f.name != "budget"}
        d["flags"] = list(self.flags)
        d["volume_cm3"] = self.volume_m3 * 1e6
        d["u_volume_cm3"] = self.u_volume_m3 * 1e6
        return d


#: the flag of a cycle left out because the thermometer gave no reading for its zero, P1 or P2
NO_TEMPERATURE = ("no temperature: the thermometer gave no valid reading for the zero, P1 or P2, so the cycle "
                  "is left out (without it the gas would be taken as keeping one temperature)")


def _temp(x: float) -> float | None:
    return x if math.isfinite(x) else None


def _fin(x: float) -> float:
    return x if math.isfinite(x) else 0.0


def _u_mean(u_t: float, n: int) -> float:
    """Standard uncertainty of a mean of n readings of noise u_t (one reading when n is unknown)."""
    return u_t / math.sqrt(n) if n > 1 else u_t


def cycle_result(cyc: CyclePressures, chambers: ChamberCalibration, *, gas: str, u_p_sys: float, u_t: float,
                 discard: int, barometer: bool = False, u_barometer: float = 0.0,
                 ambient_drift_rate: float = 0.0, u_lab: float | None = None,
                 thermometer: bool = False) -> CycleResult:
    """Volume of one cycle and its GUM budget.

    Each random input is counted once: a settled pressure's noise is in its window regression's
    standard error (Type A), so the transducer's per-reading noise is not added again; a temperature
    averaged over n readings has u_t/sqrt(n).  Systematic parts are rows of their own: the
    transducer's non-linearity ``u_p_sys`` and the relaxation each settle left to come.

    The lab pressure (see maths.cycle.AmbientModel): with a ``barometer`` P1 and P2 are taken
    against the lab pressure read over their own last samples, which corrects a change since the
    zero (the gas in the expansion volume stays at the zero's), and that reading's noise
    (``u_barometer`` per reading) is a random input; without one, a change of up to
    ``ambient_drift_rate`` Pa/s since the zero is budgeted as a systematic input (a rectangular bound)."""
    pa = cyc.ambient_pa
    amb1 = cyc.ambient1_pa if barometer and math.isfinite(cyc.ambient1_pa) else pa
    amb2 = cyc.ambient2_pa if barometer and math.isfinite(cyc.ambient2_pa) else pa
    p1, p2 = amb1 + cyc.p1_gauge_pa, amb2 + cyc.p2_gauge_pa
    # the lab pressure each settled value carries: a mean of about two 1 s readings, or where the settle
    # followed the lab (maths.cycle.AmbientModel.u_followed) what that line leaves
    u_baro = (u_barometer / math.sqrt(2.0) if barometer else 0.0) if u_lab is None else u_lab
    u_p1 = math.hypot(_fin(cyc.u_p1_settle_pa), u_baro)
    u_p2 = math.hypot(_fin(cyc.u_p2_settle_pa), u_baro)
    drift1 = 0.0 if barometer else ambient_drift_rate * _fin(cyc.since_zero1_s) / math.sqrt(3.0)
    drift2 = 0.0 if barometer else ambient_drift_rate * _fin(cyc.since_zero2_s) / math.sqrt(3.0)
    u_p1_sys = math.sqrt(u_p_sys**2 + _fin(cyc.u_p1_relax_pa) ** 2 + drift1**2)
    u_p2_sys = math.sqrt(u_p_sys**2 + _fin(cyc.u_p2_relax_pa) ** 2 + drift2**2)
    # An error in the cycle's zero shifts both gauge pressures alike: the same as an error in the
    # initial pressure of the expansion volume with P1, P2 held, which is how the budget takes Pa.
    u_pa, u_pa_sys = math.hypot(_fin(cyc.u_baseline_pa), u_baro), _fin(cyc.u_baseline_relax_pa)
    t1, t2, ta = _temp(cyc.t1_k), _temp(cyc.t2_k), _temp(cyc.ta_k)
    flags = list(cyc.flags)
    # an instrument with a thermometer that gave no reading for one of the cycle's three pressures: without
    # its temperatures the cycle would be computed as if the gas kept one temperature, its temperature terms
    # dropped from the budget - a smaller U for a lost sensor (found by a sweep); it is left out instead
    unread = thermometer and None in (t1, t2, ta)
    if unread:
        flags.append(NO_TEMPERATURE)
    u_t1 = _u_mean(u_t, cyc.n_t1) if t1 is not None else 0.0
    u_t2 = _u_mean(u_t, cyc.n_t2) if t2 is not None else 0.0
    u_ta = _u_mean(u_t, cyc.n_ta) if ta is not None else 0.0
    try:
        budget = uncertainty.cycle_volume_budget(
            p1, p2, pa, chambers.vc, chambers.vr, u_p1=u_p1, u_p2=u_p2, u_pa=u_pa, cov_cal=chambers.cov,
            t1=t1, t2=t2, ta=ta, u_t=u_t if t1 is not None else 0.0, gas=gas,
            u_p1_sys=u_p1_sys, u_p2_sys=u_p2_sys, u_pa_sys=u_pa_sys, pressures_type_a=True,
            u_t1=u_t1, u_t2=u_t2, u_ta=u_ta, r_t=(cyc.r_t1_t2, cyc.r_t1_ta, cyc.r_t2_ta),
        )
        volume, u_volume = budget.value, budget.combined
    except VolumeError as exc:
        budget, volume, u_volume = None, math.nan, math.nan
        flags.append(f"no volume: {exc}")
    if math.isfinite(volume) and outside_cell(volume, 2.0 * u_volume, chambers.vc):
        flags.append("volume outside the cell")
    return CycleResult(
        index=cyc.index, volume_name=cyc.volume_name, baseline_pa=cyc.baseline_pa, ambient_pa=pa,
        p1_gauge_pa=cyc.p1_gauge_pa, p2_gauge_pa=cyc.p2_gauge_pa, u_p1_pa=u_p1, u_p2_pa=u_p2, t1_k=t1, t2_k=t2,
        ta_k=ta, volume_m3=volume, u_volume_m3=u_volume,
        kept=cyc.index > discard and math.isfinite(volume) and not unread,
        flags=flags, budget=budget, settle1_s=cyc.settle1_s, settle2_s=cyc.settle2_s,
        drift1_pa_s=cyc.drift1_pa_s, drift2_pa_s=cyc.drift2_pa_s, fill_s=cyc.fill_s,
        u_baseline_pa=u_pa, u_p1_sys_pa=u_p1_sys, u_p2_sys_pa=u_p2_sys, u_baseline_relax_pa=u_pa_sys,
        u_p1_relax_pa=_fin(cyc.u_p1_relax_pa), u_p2_relax_pa=_fin(cyc.u_p2_relax_pa),
        u_t1_k=u_t1, u_t2_k=u_t2, u_ta_k=u_ta, r_t1_t2=cyc.r_t1_t2, r_t1_ta=cyc.r_t1_ta, r_t2_ta=cyc.r_t2_ta,
        p1_ambient_pa=amb1, p2_ambient_pa=amb2,
        u_random_m3=math.sqrt(budget.random_variance) if budget is not None else math.nan,
    )


@dataclass
class RunResult:
    """The result of a run over its kept cycles."""

    n_cycles: int
    n_kept: int
    volume_m3: float
    sd_m3: float
    rsd: float
    u_volume_m3: float  # combined standard uncertainty of the mean
    U_volume_m3: float  # expanded, k
    k: float
    converged: bool | None
    outliers: list[int]
    u_type_a_m3: float = math.nan  # the parts of u_volume_m3 evaluated from this run's own readings
    u_type_b_m3: float = math.nan  # ... and from stated figures (calibration, specifications)
    birge_ratio: float | None = None  # observed cycle scatter / the budget's predicted random part
    notes: list[str] = field(default_factory=list)  # what the budget's checks found
    density_kg_m3: float | None = None
    u_density_kg_m3: float | None = None  # standard
    U_density_kg_m3: float | None = None  # expanded
    budget: uncertainty.Budget | None = None

    def as_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d.pop("budget")
        d["budget"] = self.budget.as_table() if self.budget is not None else []
        return d


def run_result(cycles: Sequence[CycleResult], *, converge: Any = None, mass: float | None = None,
               u_mass: float = 0.0) -> RunResult | None:
    """Mean volume of the kept cycles with its combined and expanded uncertainty (None when none kept)."""
    kept = [c for c in cycles if c.kept and c.budget is not None]
    if not kept:
        return None
    vols = [c.volume_m3 for c in kept]
    st = stats.cycle_stats(vols)
    budget = uncertainty.combine_run(vols, [c.budget for c in kept])  # type: ignore[misc]
    conv = None
    if converge is not None:
        conv = has_converged(vols, converge.last, converge.within)
    # a cycle is an outlier only against a spread it could show: the scale is at least the cycles' own u
    floor = float(np.median([c.u_volume_m3 for c in kept]))
    out = stats.outliers(vols, floor=floor) if len(vols) >= 3 else []
    res = RunResult(
        n_cycles=len(cycles), n_kept=len(kept), volume_m3=budget.value, sd_m3=st.sd, rsd=st.rsd,
        u_volume_m3=budget.combined, U_volume_m3=budget.expanded, k=budget.k, converged=conv,
        outliers=[kept[i].index for i in out], budget=budget,
        u_type_a_m3=math.sqrt(max(budget.variance_by_evaluation("A"), 0.0)),
        u_type_b_m3=math.sqrt(max(budget.variance_by_evaluation("B"), 0.0)),
        birge_ratio=budget.scatter.birge_ratio if budget.scatter is not None else None,
        notes=list(budget.notes),
    )
    if mass is not None and mass > 0 and budget.value > 0:
        rho, u_rho = uncertainty.density(budget.value, budget.combined, mass, u_mass)
        res.density_kg_m3, res.u_density_kg_m3, res.U_density_kg_m3 = rho, u_rho, budget.k * u_rho
    return res


#: The flag of a run's first cycle left out because one of its settles ended in under half the time the
#: same phase took in the later cycles: with no history to hold it back, the data may have fooled it.
SETTLED_TOO_SOON = "settled in under half the later cycles' time"
#: The flag of a run's first cycle left out because its volume lies beyond its random u from the later
#: cycles': the specimen and the gas were still settling in after the purge.
STILL_SETTLING_IN = "beyond its noise from the later cycles: still settling in"
#: The flag of a kept cycle left out because the cycles after it agreed and it had not (``result_from:
#: agreeing``): it was still settling in.
WARM_UP = "warm-up: before the agreeing cycles"


def agreeing_only(cycles: Sequence[CycleResult], converge: Any = None) -> list[CycleResult]:
    """The cycles with those before the agreeing group no longer kept, where the sequence takes its
    result from the cycles that agreed (``converge.result_from: agreeing``) and the last ``last`` kept
    ones do agree; otherwise the cycles as they are.

    Why: a fixed ``discard`` guesses how many cycles a specimen takes to settle in; the agreement of the
    last few says it.  For normally distributed cycles the mean of a group is independent of its
    spread, so choosing the group by its agreement does not bias the mean."""
    out = list(cycles)
    if converge is None or getattr(converge, "result_from", "kept") != "agreeing":
        return out
    kept = [c for c in out if c.kept and c.budget is not None]
    if not has_converged([c.volume_m3 for c in kept], converge.last, converge.within):
        return out
    group = {c.index for c in kept[-converge.last:]}
    return [replace(c, kept=False, flags=[*c.flags, WARM_UP]) if c.kept and c.index not in group else c
            for c in out]


def has_converged(volumes: Sequence[float], last: int, within: float) -> bool:
    return len(volumes) >= last and stats.converged(volumes, last_k=last, within_fraction=within)
