"""Calibration maths of the workflow: sphere specs, the grouped fit and its refusal test (no simulator)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from uncertainties import ufloat

from pycnoctl.controller.domain.gas import get_gas
from pycnoctl.controller.jobs.calibration import (
    EMPTY,
    Point,
    Sphere,
    fit_points,
    parse_sphere,
    points_from_summary,
    refusal_reason,
)
from pycnoctl.controller.maths.calibration import (
    CalibrationRun,
    _u_y_temperatures,
    chi2_quantile,
    fit_calibration,
    two_point,
)

PA = 101325.0


def test_sphere_by_diameter_volume_and_uncertainty() -> None:
    s = parse_sphere("D=25.400 mm,u=0.002 mm")
    # methods.md check case [D]: a 25.4 mm sphere is 8.580247 cm^3 (pi d^3 / 6)
    assert s.volume * 1e6 == pytest.approx(8.580247, abs=5e-7)
    # propagation of u(d) through pi d^3/6, cross-checked with the `uncertainties` package (linear GUM)
    v = math.pi * ufloat(25.4e-3, 0.002e-3) ** 3 / 6
    assert s.u_volume == pytest.approx(v.std_dev, rel=1e-9)


def test_sphere_by_volume_and_bad_specs() -> None:
    s = parse_sphere("V=8.5802 cm^3,u=0.0004 cm^3,name=ball A")
    assert (s.label, s.volume, s.u_volume) == ("ball A", pytest.approx(8.5802e-6), pytest.approx(4e-10))
    for bad in ("D=25.4 mm,V=8 cm^3", "u=0.1 mm", "D=-3 mm", "D=25.4 kg", "X=3", "D=25 mm,D=26 mm", "25.4 mm"):
        with pytest.raises(ValueError):
            parse_sphere(bad)


def test_sphere_without_its_uncertainty_is_refused() -> None:
    # A sphere entered as exact would carry no certificate error into the calibration, and so into
    # no later budget (issue: such a sphere was accepted with u = 0 and became the newest calibration).
    for bad in ("D=25.4 mm", "V=8.5802 cm^3", "D=25.4 mm,u=0 mm", "V=8.5802 cm^3,u=0 cm^3"):
        with pytest.raises(ValueError, match="u"):
            parse_sphere(bad)


def _point(step: int, vin: float, p1g: float, p2g: float, u: float = 1.0) -> Point:
    return Point(step, vin, PA + p1g, PA + p2g, PA, u, u, 0.0, None, None, None)


def _ideal_p2g(vc: float, vr: float, vs: float, p1g: float) -> float:
    """Ideal-gas, isothermal mass balance P1g Vg = P2g (Vg + Vr) (methods.md working equation)."""
    vg = vc - vs
    return p1g * vg / (vg + vr)


def test_methods_check_case_recovered() -> None:
    # methods.md [D]: Vc=12, Vr=8 cm^3, P1g=1.3 bar: empty P2g=0.780000 bar, with the 25.4 mm sphere 0.389297 bar
    vk = parse_sphere("D=25.4 mm,u=0.001 mm").volume
    assert _ideal_p2g(12e-6, 8e-6, 0.0, 1.3e5) == pytest.approx(0.780000e5, abs=0.5)
    assert _ideal_p2g(12e-6, 8e-6, vk, 1.3e5) == pytest.approx(0.389297e5, abs=0.5)
    pts = [_point(0, 0.0, 1.3e5, 0.780000e5), _point(1, vk, 1.3e5, 0.389297e5)]
    fit = fit_points(pts, [EMPTY, Sphere("s", vk, 0.0)], gas="ideal")
    assert fit.vc * 1e6 == pytest.approx(12.0000, abs=5e-4)
    assert fit.vr * 1e6 == pytest.approx(8.0000, abs=5e-4)


def test_matches_fit_calibration_without_sphere_uncertainty() -> None:
    rng = np.random.default_rng(7)
    vk = 8.58e-6
    pts = []
    for step, vin in ((0, 0.0), (1, vk), (2, 4.19e-6)):
        for _ in range(4):
            p1 = 1.1e5 + rng.normal(0, 300)
            pts.append(_point(step, vin, p1, _ideal_p2g(12e-6, 8e-6, vin, p1) + rng.normal(0, 2.0), u=2.0))
    spheres = [EMPTY, Sphere("a", vk, 0.0), Sphere("b", 4.19e-6, 0.0)]
    ours = fit_points(pts, spheres, gas="ideal")
    ref = fit_calibration([CalibrationRun(p.p1, p.p2, p.pa, p.inserted) for p in pts], gas="ideal", u_p=2.0)
    assert ours.vc == pytest.approx(ref.vc, rel=1e-10)
    assert ours.vr == pytest.approx(ref.vr, rel=1e-10)
    np.testing.assert_allclose(ours.cov, ref.cov, rtol=1e-6)
    assert ours.chi2 == pytest.approx(ref.chi2, rel=1e-6)


def test_sphere_uncertainty_is_common_to_its_cycles() -> None:
    # Two steps: the closed form two_point is linear in the sphere volume vk, so u(Vc) from the sphere
    # alone is Vc u(vk)/vk and u(Vr) = Vr u(vk)/vk, however many cycles each step has [D from two_point].
    vk, u_vk = 8.58e-6, 2e-9
    pts = [_point(0, 0.0, 1.3e5, _ideal_p2g(12e-6, 8e-6, 0.0, 1.3e5), u=1e-4) for _ in range(6)]
    pts += [_point(1, vk, 1.3e5, _ideal_p2g(12e-6, 8e-6, vk, 1.3e5), u=1e-4) for _ in range(6)]
    fit = fit_points(pts, [EMPTY, Sphere("s", vk, u_vk)], gas="ideal")
    r0, rk = 1.3e5 / (pts[0].p2 - PA), 1.3e5 / (pts[-1].p2 - PA)  # gauge ratios P1g/P2g
    vc, vr = two_point(r0, rk, vk)
    assert fit.u_vc == pytest.approx(vc * u_vk / vk, rel=1e-3)
    assert fit.u_vr == pytest.approx(vr * u_vk / vk, rel=1e-3)
    assert fit.cov[0, 1] / (fit.u_vc * fit.u_vr) == pytest.approx(1.0, abs=1e-3)  # both scale with vk


def test_refuses_scatter_the_noise_does_not_explain() -> None:
    rng = np.random.default_rng(3)
    spheres = [EMPTY, Sphere("s", 8.58e-6, 0.0)]

    def points(noise: float, stated: float) -> list[Point]:
        out = []
        for step, vin in ((0, 0.0), (1, 8.58e-6)):
            for _ in range(8):
                p2 = _ideal_p2g(12e-6, 8e-6, vin, 1.2e5) + rng.normal(0, noise)
                out.append(_point(step, vin, 1.2e5 + rng.normal(0, noise), p2, u=stated))
        return out

    ok = fit_points(points(2.0, 2.0), spheres, gas="ideal")
    assert refusal_reason(ok, 0.01) is None
    bad = fit_points(points(20.0, 2.0), spheres, gas="ideal")  # scatter ten times the stated noise
    reason = refusal_reason(bad, 0.01)
    assert reason is not None and "chi-square" in reason
    assert bad.chi2 > chi2_quantile(0.99, bad.dof)


def test_a_points_temperatures_weigh_with_their_correlations() -> None:
    # Ideal gas: y depends on the temperatures only through P/T, so one error common to T1, T2 and Ta
    # (correlation 1, equal u) cancels and adds nothing to a point's u(y); independent errors of the same
    # size do. The stored correlations are read back from a run summary's cycles.
    base = {"p1": PA + 1.4e5, "p2": PA + 6e4, "pa": PA, "inserted_volume": 0.0, "t1": 296.0, "t2": 296.0,
            "ta": 296.0, "u_t1": 0.01, "u_t2": 0.01, "u_ta": 0.01}
    independent = _u_y_temperatures(CalibrationRun(**base), gas=get_gas("ideal"), mode="sample_first")
    common = _u_y_temperatures(CalibrationRun(**base, r_t=(1.0, 1.0, 1.0)), gas=get_gas("ideal"),
                               mode="sample_first")
    assert independent > 1e-5 and common < 1e-6 * independent
    cycle = {"kept": True, "ambient_pa": PA, "p1_gauge_pa": 1.4e5, "p2_gauge_pa": 6e4, "u_p1_pa": 1.0,
             "u_p2_pa": 1.0, "index": 1, "t1_k": 296.0, "t2_k": 296.0, "ta_k": 296.0, "u_t1_k": 0.01,
             "u_t2_k": 0.01, "u_ta_k": 0.01, "r_t1_t2": 0.5, "r_t1_ta": 0.25, "r_t2_ta": float("nan")}
    (point,) = points_from_summary({"cycles": [cycle]}, 0, 0.0)
    assert point.r_t == (0.5, 0.25, 0.0)  # a correlation not known is taken as none
