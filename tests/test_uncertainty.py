"""GUM budget against the analytic formula, the `uncertainties` package and a JCGM 101 Monte Carlo."""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest

CP = pytest.importorskip("CoolProp.CoolProp")
unc = pytest.importorskip("uncertainties")

from pycnoctl.controller.domain.gas import get_gas  # noqa: E402
from pycnoctl.controller.maths.advisor import X_OPTIMUM, f_factor  # noqa: E402
from pycnoctl.controller.maths.uncertainty import (  # noqa: E402
    combine_run,
    cycle_volume_budget,
    density,
    porosity,
    specific_gravity,
    type_a,
    water_density,
)
from pycnoctl.controller.maths.volume import expansion_pressure  # noqa: E402

CM3 = 1e-6
PA = 101325.0
VC, VR, VS = 10 * CM3, 7 * CM3, 5 * CM3
P1 = PA + 1.4e5
U_P = 70.0  # Pa, = 5e-4 of P1g
COV = np.array([[2.0e-9**2, 0.6 * 2.0e-9 * 3.0e-9], [0.6 * 2.0e-9 * 3.0e-9, 3.0e-9**2]])


def analytic_u(p1g, p2g, vr, cov, u_p1, u_p2):
    """methods.md [D] (GUM law of propagation written out for Vs = Vc - Vr y, y = P2g/(P1g - P2g))."""
    y = p2g / (p1g - p2g)
    var = cov[0, 0] + y * y * cov[1, 1] - 2 * y * cov[0, 1]
    var += vr**2 * (p2g**2 * u_p1**2 + p1g**2 * u_p2**2) / (p1g - p2g) ** 4
    return math.sqrt(var)


def test_budget_matches_analytic_formula():
    p2 = expansion_pressure(VS, P1, PA, VC, VR)
    b = cycle_volume_budget(P1, p2, PA, VC, VR, u_p1=U_P, u_p2=1.3 * U_P, cov_cal=COV)
    assert b.value == pytest.approx(VS, rel=1e-12)
    assert b.combined == pytest.approx(analytic_u(P1 - PA, p2 - PA, VR, COV, U_P, 1.3 * U_P), rel=1e-6)
    assert b.expanded == pytest.approx(2 * b.combined) and b.k == 2.0
    table = b.as_table()
    assert sum(r["share"] for r in table) == pytest.approx(1.0)
    assert any(r["name"].startswith("covariance") and r["variance"] < 0 for r in table)


def test_budget_matches_uncertainties_package_and_monte_carlo():
    p2 = expansion_pressure(VS, P1, PA, VC, VR)
    b = cycle_volume_budget(P1, p2, PA, VC, VR, u_p1=U_P, u_p2=U_P, u_pa=20.0, cov_cal=COV)
    # source: uncertainties package (first-order propagation with correlations)
    vc, vr = unc.correlated_values([VC, VR], COV)
    p1u, p2u, pau = unc.ufloat(P1, U_P), unc.ufloat(p2, U_P), unc.ufloat(PA, 20.0)
    ref = vc - vr / ((p1u - pau) / (p2u - pau) - 1)
    assert b.combined == pytest.approx(ref.std_dev, rel=0.02)
    # source: JCGM 101:2008 Monte Carlo, 200k draws, fixed seed
    rng = np.random.default_rng(20240601)
    n = 200_000
    vcs, vrs = rng.multivariate_normal([VC, VR], COV, size=n).T
    p1s, p2s, pas = rng.normal(P1, U_P, n), rng.normal(p2, U_P, n), rng.normal(PA, 20.0, n)
    vs_mc = vcs - vrs / ((p1s - pas) / (p2s - pas) - 1)
    ratio = vs_mc.std(ddof=1) / b.combined
    assert ratio == pytest.approx(1.0, abs=0.02)
    assert vs_mc.mean() == pytest.approx(VS, abs=0.05 * b.combined)  # no visible second-order bias


def test_real_gas_budget_with_temperatures_vs_monte_carlo():
    gas = get_gas("helium")
    t1, t2, ta = 298.3, 298.2, 298.1
    u_t = 0.02
    p2 = expansion_pressure(VS, P1, PA, VC, VR, gas=gas, t1=t1, t2=t2, ta=ta)
    b = cycle_volume_budget(P1, p2, PA, VC, VR, u_p1=U_P, u_p2=U_P, cov_cal=COV, t1=t1, t2=t2, ta=ta,
                            u_t=u_t, gas=gas)
    # JCGM 101 Monte Carlo through the same mass balance (Gas.molar_density accepts numpy arrays)
    rng = np.random.default_rng(99)
    n = 200_000
    vcs, vrs = rng.multivariate_normal([VC, VR], COV, size=n).T
    p1s, p2s = rng.normal(P1, U_P, n), rng.normal(p2, U_P, n)
    t1s, t2s, tas = (rng.normal(t, u_t, n) for t in (t1, t2, ta))
    r1, r2, ra = gas.molar_density(p1s, t1s), gas.molar_density(p2s, t2s), gas.molar_density(PA, tas)
    vs_mc = vcs - vrs * (r2 - ra) / (r1 - r2)
    assert vs_mc.std(ddof=1) / b.combined == pytest.approx(1.0, abs=0.02)
    assert b.variance_of("temperature") > 0


def test_correlated_temperatures_vs_monte_carlo():
    # T1, T2 and Ta as values of one thermometer line that share readings (correlations as a zero, P1
    # and P2 a minute apart give): the budget's covariance rows against a JCGM 101 Monte Carlo drawing the
    # three from their joint normal distribution, with a common part that cancels in the mass balance
    gas = get_gas("nitrogen")
    t1, t2, ta = 296.0, 296.01, 295.99
    u = np.array([6e-4, 5e-4, 7e-4])
    r12, r1a, r2a = 0.6, 0.4, 0.1
    corr = np.array([[1.0, r12, r1a], [r12, 1.0, r2a], [r1a, r2a, 1.0]])
    p2 = expansion_pressure(VS, P1, PA, VC, VR, gas=gas, t1=t1, t2=t2, ta=ta)
    b = cycle_volume_budget(P1, p2, PA, VC, VR, u_p1=1.0, u_p2=1.0, t1=t1, t2=t2, ta=ta, gas=gas,
                            u_t1=u[0], u_t2=u[1], u_ta=u[2], r_t=(r12, r1a, r2a))
    rng = np.random.default_rng(7)
    n = 400_000
    t1s, t2s, tas = rng.multivariate_normal([t1, t2, ta], corr * np.outer(u, u), size=n).T
    r1, r2, ra = gas.molar_density(P1, t1s), gas.molar_density(p2, t2s), gas.molar_density(PA, tas)
    vs_mc = VC - VR * (r2 - ra) / (r1 - r2)
    assert math.sqrt(b.variance_of("temperature")) / vs_mc.std(ddof=1) == pytest.approx(1.0, abs=0.01)
    independent = cycle_volume_budget(P1, p2, PA, VC, VR, u_p1=1.0, u_p2=1.0, t1=t1, t2=t2, ta=ta, gas=gas,
                                      u_t1=u[0], u_t2=u[1], u_ta=u[2])
    # the premise: the correlations matter here (T1 and T2 enter with opposite signs)
    assert independent.variance_of("temperature") > 1.3 * b.variance_of("temperature")
    rows = [c for c in b.contributions if c.name.startswith("correlation")]
    assert len(rows) == 3 and all(c.random and c.kind == "temperature" for c in rows)


def test_f_of_x_minimum_and_flatness():
    # methods.md [D]: f(x) = (1+x) sqrt(1+(1+x)^2)/x smallest near x = 1.21 (f = 4.43), f <= 4.8 on [0.7, 2]
    xs = np.linspace(0.3, 5.0, 47001)
    fs = np.array([f_factor(x) for x in xs])
    assert xs[fs.argmin()] == pytest.approx(1.21, abs=0.01)
    assert fs.min() == pytest.approx(4.43, abs=0.005)
    assert pytest.approx(xs[fs.argmin()], abs=1e-3) == X_OPTIMUM
    assert max(f_factor(x) for x in np.linspace(0.7, 2.0, 131)) <= 4.8


@pytest.mark.parametrize(("phi", "percent"), [(0.2, 0.89), (0.5, 0.22), (0.8, 0.055)])
def test_relative_u_against_fill_fraction(phi, percent):
    # methods.md [D]: u_P/P1g = 5e-4, expansion volume at the optimum x: 0.89 / 0.22 / 0.055 %
    vs = phi * VC
    vr = X_OPTIMUM * (VC - vs)
    p1g = 1.4e5
    p2 = expansion_pressure(vs, PA + p1g, PA, VC, vr)
    b = cycle_volume_budget(PA + p1g, p2, PA, VC, vr, u_p1=5e-4 * p1g, u_p2=5e-4 * p1g)
    rel = b.combined / b.value * 100
    assert rel == pytest.approx(percent, rel=0.01 if phi < 0.8 else 0.02)
    assert rel == pytest.approx((1 - phi) / phi * 5e-4 * f_factor(X_OPTIMUM) * 100, rel=1e-5)


def test_type_a_vs_statistics_module():
    x = [5.0012, 5.0008, 4.9991, 5.0003, 5.0010]
    mean, s, u_mean = type_a(x)
    # source: Python statistics module (sample standard deviation, n - 1)
    assert mean == pytest.approx(statistics.fmean(x))
    assert s == pytest.approx(statistics.stdev(x))
    assert u_mean == pytest.approx(statistics.stdev(x) / math.sqrt(5))
    assert math.isnan(type_a([1.0])[1])
    with pytest.raises(ValueError):
        type_a([])


def test_combine_run_keeps_calibration_whole_and_averages_noise():
    p2 = expansion_pressure(VS, P1, PA, VC, VR)
    b = cycle_volume_budget(P1, p2, PA, VC, VR, u_p1=U_P, u_p2=U_P, cov_cal=COV)
    n = 4
    rng = np.random.default_rng(5)
    vols = list(VS + rng.normal(0, 1e-12, n))  # tiny scatter: the budget floor decides
    run = combine_run(vols, [b] * n)
    cal = b.variance_of("calibration")
    pressure = b.combined**2 - cal
    assert run.combined**2 == pytest.approx(cal + pressure / n, rel=1e-9)
    big = list(VS + np.array([3, -2, 1, -2]) * 1e-8)  # scatter larger than the budget: Type A decides
    run2 = combine_run(big, [b] * n)
    assert run2.combined**2 == pytest.approx(cal + statistics.stdev(big) ** 2 / n, rel=1e-9)
    assert run2.value == pytest.approx(statistics.fmean(big))


def test_density_and_silicon_check_value():
    # methods.md [D from CODATA molar volume]: single-crystal Si = 28.0855 g/mol / 12.0588349 cm^3/mol
    rho_si = 28.0855 / 12.0588349  # g/cm^3
    assert rho_si == pytest.approx(2.3290, abs=5e-5)
    vs = 5 * CM3
    rho, u = density(vs, 0.005 * CM3, rho_si * 5e-3, 0.1e-6)
    assert rho / 1000 == pytest.approx(rho_si, rel=1e-12)
    # source: uncertainties package
    ref = unc.ufloat(rho_si * 5e-3, 0.1e-6) / unc.ufloat(vs, 0.005 * CM3)
    assert u == pytest.approx(ref.std_dev, rel=1e-9)


def test_water_density_check_values():
    # methods.md [D: CoolProp IAPWS-95]: 0.998207 g/cm^3 at 20 C, and CoolProp itself
    assert water_density(293.15) / 1000 == pytest.approx(0.998207, abs=2e-6)
    iapws_20c = CP.PropsSI("D", "T", 293.15, "P", 101325, "Water")
    assert water_density(293.15) == pytest.approx(iapws_20c, abs=2e-3)
    # [M: from memory] 0.997047 g/cm^3 at 25 C
    assert water_density(298.15) / 1000 == pytest.approx(0.997047, abs=2e-6)
    # over 0-40 C against CoolProp IAPWS-95 water at 101.325 kPa: within 2e-6 g/cm^3
    for t in np.linspace(273.16, 313.15, 21):
        assert water_density(t) == pytest.approx(CP.PropsSI("D", "T", t, "P", 101325, "Water"), abs=2e-3)
    with pytest.raises(ValueError):
        water_density(330.0)


def test_specific_gravity():
    sg, u = specific_gravity(2329.0, 0.5, 293.15)
    assert sg == pytest.approx(2329.0 / CP.PropsSI("D", "T", 293.15, "P", 101325, "Water"), rel=2e-6)
    assert u == pytest.approx(0.5 / water_density(293.15))


def test_porosity_vs_uncertainties_package():
    phi, u = porosity(20 * CM3, 0.05 * CM3, 12 * CM3, 0.01 * CM3)
    assert phi == pytest.approx(0.4)
    # source: uncertainties package; porosity = 1 - Vs/Vb (ASM Handbook)
    ref = 1 - unc.ufloat(12, 0.01) / unc.ufloat(20, 0.05)
    assert u == pytest.approx(ref.std_dev, rel=1e-9)


def _print_figures() -> None:  # pragma: no cover - `python tests/test_uncertainty.py --figures`
    p2 = expansion_pressure(VS, P1, PA, VC, VR)
    b = cycle_volume_budget(P1, p2, PA, VC, VR, u_p1=U_P, u_p2=U_P, u_pa=20.0, cov_cal=COV)
    vc, vr = unc.correlated_values([VC, VR], COV)
    p1u, p2u, pau = unc.ufloat(P1, U_P), unc.ufloat(p2, U_P), unc.ufloat(PA, 20.0)
    ref = vc - vr / ((p1u - pau) / (p2u - pau) - 1)
    rng = np.random.default_rng(20240601)
    n = 200_000
    vcs, vrs = rng.multivariate_normal([VC, VR], COV, size=n).T
    p1s, p2s, pas = rng.normal(P1, U_P, n), rng.normal(p2, U_P, n), rng.normal(PA, 20.0, n)
    mc = vcs - vrs / ((p1s - pas) / (p2s - pas) - 1)
    print(f"ideal gas: u_c = {b.combined / CM3:.5g} cm^3, uncertainties/analytic = "
          f"{ref.std_dev / b.combined:.6f}, Monte Carlo (200k)/analytic = {mc.std(ddof=1) / b.combined:.4f}")
    xs = np.linspace(0.3, 5.0, 47001)
    fs = np.array([f_factor(x) for x in xs])
    print(f"f(x) minimum at x = {xs[fs.argmin()]:.4f}, f = {fs.min():.4f}")


if __name__ == "__main__":
    import sys

    if "--figures" in sys.argv:
        _print_figures()
