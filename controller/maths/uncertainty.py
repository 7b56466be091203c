"""Uncertainty budgets per the GUM (JCGM 100:2008): law of propagation, first order, k = 2.

Why here and not in the measuring code: the same budget serves the offline calculator, the
daemon's run reports and the advisor, and it is checked against the `uncertainties` package and a
JCGM 101:2008 Monte Carlo draw in the tests.

Sensitivities are central differences of volume.sample_volume, so they hold for the real-gas and
temperature-corrected equation; for the ideal gas they equal the analytic form
u^2(Vs) = u^2(Vc) + y^2 u^2(Vr) - 2 y cov(Vc,Vr) + Vr^2 [P2g^2 u^2(P1g) + P1g^2 u^2(P2g)]/(P1g - P2g)^4.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

from pycnoctl.controller.domain.gas import Gas, get_gas
from pycnoctl.controller.domain.values import FrozenValue, Value
from pycnoctl.controller.maths.volume import expansion_ratio, resolve_temperatures, sample_volume

# typing.TYPE_CHECKING without importing typing (about 2 ms of every start of the command line; the
# annotations are never evaluated): type checkers take the name as True.
TYPE_CHECKING = False
if TYPE_CHECKING:
    from typing import Any


def fmean(data: Sequence[float]) -> float:
    """statistics.fmean, its module imported on first use (3 ms of every CLI start otherwise)."""
    import statistics

    return statistics.fmean(data)


def stdev(data: Sequence[float], xbar: float | None = None) -> float:
    """statistics.stdev, imported on first use as fmean."""
    import statistics

    return statistics.stdev(data, xbar)

K_DEFAULT = 2.0


# Contribution, Budget and ScatterCheck are not dataclasses (see domain.values: the start-up of
# `pycnoctl compute`, which builds a Budget): the two mutable ones are unhashable, ScatterCheck is
# immutable and hashable, as they were.


class Contribution(Value):
    """One input: its value, standard uncertainty, sensitivity coefficient and c*u (signed).

    ``variance`` is what the row adds to u_c^2 (c^2 u^2, or 2 c_i c_j cov for a covariance row,
    which may be negative).  ``kind`` groups rows: calibration, pressure, temperature, repeatability.
    ``random``: the input's error changes from cycle to cycle (noise), so it averages over a run's
    cycles and shows in their scatter; otherwise it is the same in every cycle (a calibration, a
    transducer's non-linearity, a relaxation the settle leaves the same way each time) and enters a
    run's mean once.  ``evaluation``: GUM Type "A" (from the statistics of this run's own readings)
    or "B" (from stated figures: certificates, specifications, a calibration).
    """

    _FIELDS = ("name", "value", "std_u", "sensitivity", "contribution", "variance", "kind", "random", "evaluation")
    name: str
    value: float
    std_u: float
    sensitivity: float
    contribution: float
    variance: float  # default: contribution**2
    kind: str
    random: bool
    evaluation: str

    def __init__(self, name: str, value: float, std_u: float, sensitivity: float, contribution: float,
                 variance: float = math.nan, kind: str = "", random: bool = False, evaluation: str = "B") -> None:
        self.name = name
        self.value = value
        self.std_u = std_u
        self.sensitivity = sensitivity
        self.contribution = contribution
        self.variance = contribution**2 if math.isnan(variance) else variance
        self.kind = kind
        self.random = random
        self.evaluation = evaluation



class Budget(Value):
    """Combined standard uncertainty of one quantity and the rows that make it up."""

    _FIELDS = ("quantity", "value", "contributions", "combined", "k", "expanded", "unit", "notes", "scatter")
    quantity: str
    value: float
    contributions: list[Contribution]
    combined: float
    k: float
    expanded: float  # default: k * combined
    unit: str
    notes: list[str]
    scatter: ScatterCheck | None  # a run's budget: its cycles' scatter against the prediction

    def __init__(self, quantity: str, value: float, contributions: list[Contribution], combined: float,
                 k: float = K_DEFAULT, expanded: float = math.nan, unit: str = "m^3", notes: list[str] | None = None,
                 scatter: ScatterCheck | None = None) -> None:
        self.quantity = quantity
        self.value = value
        self.contributions = contributions
        self.combined = combined
        self.k = k
        self.expanded = k * combined if math.isnan(expanded) else expanded
        self.unit = unit
        self.notes = [] if notes is None else notes
        self.scatter = scatter

    def as_table(self) -> list[dict[str, float | str]]:
        """Rows for printing or JSON: name, value, std_u, sensitivity, contribution, share of u_c^2."""
        total = self.combined**2
        return [
            {
                "name": c.name,
                "kind": c.kind,
                "value": c.value,
                "std_u": c.std_u,
                "sensitivity": c.sensitivity,
                "contribution": c.contribution,
                "variance": c.variance,
                "share": c.variance / total if total > 0 else math.nan,
                "random": c.random,
                "evaluation": c.evaluation,
            }
            for c in self.contributions
        ]

    def variance_of(self, kind: str) -> float:
        return sum(c.variance for c in self.contributions if c.kind == kind)

    @property
    def random_variance(self) -> float:
        """What the rows that change from cycle to cycle add to u_c^2: the scatter a run should show."""
        return sum(c.variance for c in self.contributions if c.random)

    def variance_by_evaluation(self, evaluation: str) -> float:
        return sum(c.variance for c in self.contributions if c.evaluation == evaluation)


def _derivative(fn: Callable[[float], float], x: float, u: float) -> float:
    h = max(abs(x) * 1e-7, u * 1e-3, 1e-30)
    return float((fn(x + h) - fn(x - h)) / (2.0 * h))


def cycle_volume_budget(
    p1: float,
    p2: float,
    pa: float,
    vc: float,
    vr: float,
    *,
    u_p1: float,
    u_p2: float,
    u_pa: float = 0.0,
    cov_cal: Any = None,
    u_vc: float = 0.0,
    u_vr: float = 0.0,
    t1: float | None = None,
    t2: float | None = None,
    ta: float | None = None,
    u_t: float = 0.0,
    gas: Gas | str = "ideal",
    mode: str = "sample_first",
    k: float = K_DEFAULT,
    u_p1_sys: float = 0.0,
    u_p2_sys: float = 0.0,
    u_pa_sys: float = 0.0,
    u_t1: float | None = None,
    u_t2: float | None = None,
    u_ta: float | None = None,
    pressures_type_a: bool = False,
    r_t: tuple[float, float, float] = (0.0, 0.0, 0.0),
) -> Budget:
    """Budget for the sample volume of one expansion.

    ``cov_cal`` (2x2 for (vc, vr), e.g. CalibrationFit.cov) takes precedence over u_vc/u_vr.
    ``u_p1``, ``u_p2``, ``u_pa``: the random parts of the pressures (from cycle to cycle; Type A when
    ``pressures_type_a``, i.e. they come from the settle window's regression); ``u_*_sys`` their
    systematic parts (the same in every cycle), each a row of its own.
    ``u_t`` is the standard uncertainty of each temperature, taken as independent between t1, t2 and
    ta (noise, drift and non-uniformity; a common thermometer offset cancels and is left out);
    ``u_t1``/``u_t2``/``u_ta`` override it per temperature (a mean of n readings has u_t/sqrt(n)).
    ``r_t``: the correlations of the temperatures' random errors (T1 with T2, T1 with Ta, T2 with Ta),
    e.g. values of one line through the thermometer's readings that share readings; each non-zero
    one is a covariance row 2 c_i c_j r u_i u_j of its own, random like the temperatures.
    """
    g = get_gas(gas)
    t1_, t2_, ta_ = resolve_temperatures(t1, t2, ta)
    args = {"p1": p1, "p2": p2, "pa": pa, "vc": vc, "vr": vr, "t1": t1_, "t2": t2_, "ta": ta_}

    def vs_of(**over: float) -> float:
        a = {**args, **over}
        return sample_volume(a["p1"], a["p2"], a["pa"], a["vc"], a["vr"], gas=g, t1=a["t1"],
                             t2=a["t2"], ta=a["ta"], mode=mode)

    value = vs_of()
    if cov_cal is not None:  # any 2x2 nested sequence or array; plain floats keep numpy off this path
        cov = [[float(x) for x in row] for row in cov_cal]
        if len(cov) != 2 or any(len(row) != 2 for row in cov):
            raise ValueError("cov_cal must be a 2x2 matrix for (vc, vr)")
    else:
        cov = [[u_vc**2, 0.0], [0.0, u_vr**2]]
    y = expansion_ratio(p1, p2, pa, gas=g, t1=t1_, t2=t2_, ta=ta_, mode=mode)
    rows: list[Contribution] = []
    c_vc, c_vr = 1.0, -y  # exact: Vs = Vc - Vr y
    u_vc_, u_vr_ = math.sqrt(max(cov[0][0], 0.0)), math.sqrt(max(cov[1][1], 0.0))
    rows.append(Contribution("cell volume Vc", vc, u_vc_, c_vc, c_vc * u_vc_, kind="calibration"))
    rows.append(Contribution("expansion volume Vr", vr, u_vr_, c_vr, c_vr * u_vr_, kind="calibration"))
    if cov[0][1] != 0.0:
        var = 2.0 * c_vc * c_vr * cov[0][1]
        rows.append(Contribution("covariance Vc, Vr", cov[0][1], math.nan, math.nan,
                                 math.copysign(math.sqrt(abs(var)), var), variance=var, kind="calibration"))
    ev_p = "A" if pressures_type_a else "B"
    for name, label, x, u, kind, rand, ev in (
        ("p1", "fill pressure P1", p1, u_p1, "pressure", True, ev_p),
        ("p2", "expansion pressure P2", p2, u_p2, "pressure", True, ev_p),
        ("pa", "ambient pressure Pa", pa, u_pa, "pressure", True, ev_p),
        ("p1", "fill pressure P1, systematic", p1, u_p1_sys, "pressure", False, "B"),
        ("p2", "expansion pressure P2, systematic", p2, u_p2_sys, "pressure", False, "B"),
        ("pa", "ambient pressure Pa, systematic", pa, u_pa_sys, "pressure", False, "B"),
        ("t1", "temperature T1", t1_, u_t if u_t1 is None else u_t1, "temperature", True, "B"),
        ("t2", "temperature T2", t2_, u_t if u_t2 is None else u_t2, "temperature", True, "B"),
        ("ta", "temperature Ta", ta_, u_t if u_ta is None else u_ta, "temperature", True, "B"),
    ):
        if u <= 0.0 and (kind == "temperature" or not rand):
            continue
        def at(v: float, n: str = name) -> float:
            return vs_of(**{n: v})

        c = _derivative(at, x, u)
        rows.append(Contribution(label, x, u, c, c * u, kind=kind, random=rand, evaluation=ev))
    rows.extend(_temperature_covariances(rows, r_t))
    combined = math.sqrt(max(sum(r.variance for r in rows), 0.0))
    return Budget("sample volume", value, rows, combined, k=k)


#: The temperature pairs whose correlations ``r_t`` gives, in its order.
TEMPERATURE_PAIRS = (("T1", "T2"), ("T1", "Ta"), ("T2", "Ta"))


def temperature_pair_covariances(cu: dict[str, float], r_t: tuple[float, float, float]
                                 ) -> list[tuple[str, str, float, float]]:
    """(a, b, r, 2 c_a u_a c_b u_b r) for each correlated pair of the temperatures in ``cu`` (their c u,
    keyed T1, T2, Ta): GUM 5.2.2.  The volume budget and the calibration fit both add these."""
    out = []
    for (a, b), r in zip(TEMPERATURE_PAIRS, r_t, strict=True):
        if a in cu and b in cu and r != 0.0 and math.isfinite(r):
            r = max(-1.0, min(1.0, r))
            out.append((a, b, r, 2.0 * cu[a] * cu[b] * r))
    return out


def _temperature_covariances(rows: list[Contribution], r_t: tuple[float, float, float]) -> list[Contribution]:
    """Covariance rows for correlated temperature errors (GUM 5.2.2: 2 c_i c_j u_i u_j r_ij)."""
    cu = {r.name.removeprefix("temperature "): r.contribution for r in rows if r.kind == "temperature"}
    return [Contribution(f"correlation {a}, {b}", r, math.nan, math.nan, math.copysign(math.sqrt(abs(var)), var),
                         variance=var, kind="temperature", random=True, evaluation="B")
            for a, b, r, var in temperature_pair_covariances(cu, r_t)]


def type_a(values: Sequence[float]) -> tuple[float, float, float]:
    """Mean, experimental standard deviation s (n-1) and standard uncertainty of the mean s/sqrt(n).

    One value: s and u_mean are NaN (no Type A evaluation is possible).
    """
    x = [float(v) for v in values]
    if not x:
        raise ValueError("type_a needs at least one value")
    mean = fmean(x)
    if len(x) < 2:
        return mean, math.nan, math.nan
    s = stdev(x, mean)
    return mean, s, s / math.sqrt(len(x))


#: Probability below which the cycles' scatter is called inconsistent with the budget's random part
#: (each tail; two-sided 2 %): informative, not a refusal.
SCATTER_ALPHA = 0.01


class ScatterCheck(FrozenValue):
    """The cycles' observed scatter against the per-cycle budget's random part (a Birge ratio).

    Why: the budget predicts how far cycles should scatter from the noise it knows of; a scatter
    well above it means an effect the budget lacks (drift, leaks, a moving barometer), and one well
    below means the random inputs are overstated.  Tested as chi-square = (n-1) s^2 / sigma^2 with
    n-1 degrees of freedom (GUM Annex; a Birge ratio R = s/sigma).

    Immutable (see the note above Contribution for why it is not a dataclass)."""

    _FIELDS = ("n", "sd", "predicted", "birge_ratio", "p_above", "p_below")
    n: int
    sd: float  # observed cycle-to-cycle standard deviation
    predicted: float  # the budget's random standard uncertainty of one cycle
    birge_ratio: float  # sd / predicted
    p_above: float  # P(chi-square >= observed): small when the scatter is too large
    p_below: float  # P(chi-square <= observed): small when the scatter is too small

    def __init__(self, n: int, sd: float, predicted: float, birge_ratio: float, p_above: float,
                 p_below: float) -> None:
        self._freeze(n=n, sd=sd, predicted=predicted, birge_ratio=birge_ratio, p_above=p_above, p_below=p_below)

    @property
    def verdict(self) -> str:
        if self.p_above < SCATTER_ALPHA:
            return "above"
        if self.p_below < SCATTER_ALPHA:
            return "below"
        return "consistent"

    def note(self) -> str | None:
        if self.verdict == "above":
            return (f"the cycles scatter {self.birge_ratio:.2g} times what the budget's random part predicts "
                    f"(SD {self.sd:.3g} against {self.predicted:.3g} m^3, n={self.n}, P={self.p_above:.2g}): "
                    "the observed scatter is used; something the budget lacks moves the cycles (drift, a "
                    "leak, the lab's pressure or temperature changing)")
        if self.verdict == "below":
            return (f"the cycles scatter only {self.birge_ratio:.2g} times what the budget's random part "
                    f"predicts (SD {self.sd:.3g} against {self.predicted:.3g} m^3, n={self.n}, "
                    f"P={self.p_below:.2g}): the stated noise of the instrument may be larger than its real noise")
        return None


def scatter_check(values: Sequence[float], predicted: float) -> ScatterCheck | None:
    """The scatter test of ScatterCheck (None with fewer than 2 values or no prediction)."""
    x = [float(v) for v in values]
    if len(x) < 2 or not predicted > 0.0:
        return None
    from pycnoctl.controller.maths.chisq import chi2_cdf, chi2_sf

    sd = stdev(x)
    dof = len(x) - 1
    stat = dof * (sd / predicted) ** 2
    return ScatterCheck(len(x), sd, predicted, sd / predicted, chi2_sf(stat, dof), chi2_cdf(stat, dof))


def combine_run(cycle_volumes: Sequence[float], cycle_budgets: Sequence[Budget]) -> Budget:
    """Budget of the mean volume of a run of cycles.

    Random part (the rows marked ``random``: noise in the settled pressures and temperatures): it
    changes from cycle to cycle, so it averages down and shows in the scatter.  Taken as the larger
    of the Type A u of the mean (s/sqrt(n)) and the budgets' predicted random u / sqrt(n): counting
    both would count the same noise twice, and a Type A from a few cycles can understate by chance.
    The scatter is also tested against the prediction (ScatterCheck); a difference either way is
    noted.
    Systematic part (every other row: calibration Vc, Vr and their covariance, a transducer's
    non-linearity, the relaxation a settle leaves the same way each time): the same in every cycle,
    so it does not average down; each row enters once, never divided by the number of cycles.
    """
    vols = list(cycle_volumes)
    if len(vols) != len(cycle_budgets) or not vols:
        raise ValueError("need one budget per cycle volume, at least one cycle")
    n = len(vols)
    mean, _s, u_mean = type_a(vols)
    random_var = fmean([b.random_variance for b in cycle_budgets])
    u_floor = math.sqrt(max(random_var, 0.0) / n)
    notes = []
    check = scatter_check(vols, math.sqrt(max(random_var, 0.0)))
    if math.isnan(u_mean) or u_floor > u_mean:
        u_rand, label, ev = u_floor, f"repeatability (predicted from the cycle budget, n={n})", "B"
    else:
        u_rand, label, ev = u_mean, f"repeatability (Type A, s/sqrt(n), n={n})", "A"
    note = check.note() if check is not None else None
    if note is not None:
        notes.append(note)
    rows = [Contribution(label, mean, u_rand, 1.0, u_rand, kind="repeatability", random=True, evaluation=ev)]
    # systematic rows: averaged over the cycles (the sensitivity -y barely changes between cycles)
    first = cycle_budgets[0]
    for name in [c.name for c in first.contributions if not c.random]:
        same = [c for b in cycle_budgets for c in b.contributions if c.name == name]
        var = fmean([x.variance for x in same])
        sens = fmean([x.sensitivity for x in same])
        u = fmean([x.std_u for x in same])
        contrib = sens * u if math.isfinite(sens) and math.isfinite(u) else math.copysign(math.sqrt(abs(var)), var)
        rows.append(Contribution(name, same[0].value, u, sens, contrib, variance=var, kind=same[0].kind,
                                 random=False, evaluation=same[0].evaluation))
    combined = math.sqrt(max(sum(r.variance for r in rows), 0.0))
    return Budget("mean sample volume", mean, rows, combined, k=first.k, notes=notes, scatter=check)


def density(volume: float, u_volume: float, mass: float, u_mass: float) -> tuple[float, float]:
    """rho = m/V (kg/m^3) and its standard uncertainty (m and V independent)."""
    if volume <= 0.0 or mass <= 0.0:
        raise ValueError("density needs a positive volume and mass")
    rho = mass / volume
    return rho, rho * math.hypot(u_mass / mass, u_volume / volume)


def water_density(temperature_k: float) -> float:
    """Density of air-free water at 101.325 kPa, kg/m^3, valid 0-40 C.

    The five-constant rational formula recommended in 2001 for air-free standard mean ocean water:
    rho = a5 [1 - (t + a1)^2 (t + a2) / (a3 (t + a4))], t in degC (constants from memory [M];
    the tests compare the formula with CoolProp's IAPWS-95 water).
    """
    t = temperature_k - 273.15
    if not -0.5 <= t <= 40.5:
        raise ValueError(f"water density formula is valid 0-40 C, got {t:.2f} C")
    a1, a2, a3, a4, a5 = -3.983035, 301.797, 522528.9, 69.34881, 999.974950
    return a5 * (1.0 - (t + a1) ** 2 * (t + a2) / (a3 * (t + a4)))


def specific_gravity(rho: float, u_rho: float, water_temperature_K: float) -> tuple[float, float]:
    """Ratio of the density to that of air-free water at the stated temperature (and its u)."""
    rw = water_density(water_temperature_K)
    return rho / rw, u_rho / rw


def porosity(bulk_volume: float, u_bulk: float, skeletal_volume: float, u_skel: float) -> tuple[float, float]:
    """phi = 1 - Vs/Vb = pore volume / bulk volume, with u (volumes independent)."""
    if bulk_volume <= 0.0:
        raise ValueError("bulk volume must be positive")
    phi = 1.0 - skeletal_volume / bulk_volume
    u = math.hypot(u_skel / bulk_volume, skeletal_volume * u_bulk / bulk_volume**2)
    return phi, u
