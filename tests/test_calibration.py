"""Calibration of Vc and Vr: the methods.md check case, recovery with noise, real gas, degenerate input."""

from __future__ import annotations

import math

import numpy as np
import pytest

CP = pytest.importorskip("CoolProp.CoolProp")
optimize = pytest.importorskip("scipy.optimize")
stats = pytest.importorskip("scipy.stats")
unc = pytest.importorskip("uncertainties")

from pycnoctl.controller.maths.calibration import (  # noqa: E402
    CalibrationError,
    CalibrationRun,
    chi2_quantile,
    fit_calibration,
    sphere_volume,
    two_point,
)
from pycnoctl.controller.maths.volume import expansion_pressure  # noqa: E402

CM3 = 1e-6
PA = 101325.0
VC, VR = 12 * CM3, 8 * CM3
P1 = PA + 1.3e5
SPHERES = [0.0, sphere_volume(0.0254), sphere_volume(0.019), sphere_volume(0.0127)]


def runs_for(volumes, *, noise=0.0, rng=None, gas="ideal", u_p=None):
    out = []
    for v in volumes:
        p2 = expansion_pressure(v, P1, PA, VC, VR, gas=gas)
        if noise:
            p1n, p2n = P1 + rng.normal(0, noise), p2 + rng.normal(0, noise)
        else:
            p1n, p2n = P1, p2
        out.append(CalibrationRun(p1n, p2n, PA, v, u_p=u_p))
    return out


def test_sphere_volume():
    # pi d^3 / 6; methods.md [D]: a 25.4 mm sphere is 8.580247 cm^3
    assert sphere_volume(0.0254) / CM3 == pytest.approx(8.580247, abs=5e-7)
    with pytest.raises(CalibrationError):
        sphere_volume(-1.0)


def test_methods_check_case_two_point():
    # methods.md [D]: Vc=12, Vr=8, P1g=1.3 bar: empty P2g=0.780000, 25.4 mm sphere P2g=0.389297 bar
    vk = sphere_volume(0.0254)
    p2e = expansion_pressure(0.0, P1, PA, VC, VR)
    p2k = expansion_pressure(vk, P1, PA, VC, VR)
    assert (p2e - PA) / 1e5 == pytest.approx(0.780000, abs=5e-7)
    assert (p2k - PA) / 1e5 == pytest.approx(0.389297, abs=5e-7)
    # the closed form on the printed (rounded) gauge pressures recovers 12.0000 / 8.0000
    vc, vr = two_point(1.3 / 0.780000, 1.3 / 0.389297, vk)
    assert vc / CM3 == pytest.approx(12.0000, abs=5e-4)
    assert vr / CM3 == pytest.approx(8.0000, abs=5e-4)
    fit = fit_calibration([CalibrationRun(P1, p2e, PA, 0.0), CalibrationRun(P1, p2k, PA, vk)], u_p=5.0)
    assert fit.vc == pytest.approx(VC, rel=1e-12) and fit.vr == pytest.approx(VR, rel=1e-12)
    assert fit.dof == 0 and fit.consistent()


def test_noise_free_multi_run_fit_is_exact():
    fit = fit_calibration(runs_for(SPHERES * 2), u_p=5.0)
    assert fit.vc == pytest.approx(VC, rel=1e-12) and fit.vr == pytest.approx(VR, rel=1e-12)
    assert np.max(np.abs(fit.residuals_volume)) < 1e-15
    assert fit.n_runs == 8 and fit.dof == 6


def test_noisy_fit_within_three_u_and_coverage():
    # 95 % coverage of +/- 1.96 u over repeated seeds (common practice check of a stated uncertainty)
    u_p = 8.0
    hits_vc = hits_vr = 0
    n_seeds = 300
    for seed in range(n_seeds):
        rng = np.random.default_rng(seed)
        fit = fit_calibration(runs_for(SPHERES * 2, noise=u_p, rng=rng), u_p=u_p)
        if seed < 20:
            assert abs(fit.vc - VC) < 3 * fit.u_vc and abs(fit.vr - VR) < 3 * fit.u_vr
        hits_vc += abs(fit.vc - VC) < 1.96 * fit.u_vc
        hits_vr += abs(fit.vr - VR) < 1.96 * fit.u_vr
    # binomial(300, 0.95): sd 1.26 %; accept 0.90-0.99
    assert 0.90 <= hits_vc / n_seeds <= 0.99
    assert 0.90 <= hits_vr / n_seeds <= 0.99


def test_chi_square_consistency_check():
    rng = np.random.default_rng(7)
    honest = fit_calibration(runs_for(SPHERES * 3, noise=5.0, rng=rng), u_p=5.0)
    assert honest.consistent()
    rng = np.random.default_rng(7)
    optimistic = fit_calibration(runs_for(SPHERES * 3, noise=40.0, rng=rng), u_p=5.0)
    assert not optimistic.consistent()
    assert optimistic.chi2_per_dof > 10
    # scaled covariance = Birge ratio^2 times the propagated one
    assert optimistic.cov_scaled[0, 0] == pytest.approx(optimistic.cov[0, 0] * optimistic.chi2_per_dof)


@pytest.mark.parametrize(("p", "dof", "table"), [
    (0.95, 1, 3.841), (0.95, 2, 5.991), (0.95, 10, 18.307), (0.95, 22, 33.924), (0.95, 30, 43.773),
    (0.99, 1, 6.635), (0.99, 4, 13.277), (0.99, 10, 23.209), (0.99, 22, 40.289),
    (0.05, 10, 3.940), (0.01, 22, 9.542),
])
def test_chi_square_quantile_matches_the_printed_table(p, dof, table):
    # source: the standard table of chi-square critical values (e.g. NIST/SEMATECH e-Handbook of
    # Statistical Methods, 1.3.6.7.4), printed to 3 decimals; values quoted from memory of that table
    assert chi2_quantile(p, dof) == pytest.approx(table, abs=6e-4)


def test_inverse_prediction_with_covariance_vs_uncertainties_package():
    rng = np.random.default_rng(3)
    fit = fit_calibration(runs_for(SPHERES * 2, noise=5.0, rng=rng), u_p=5.0)
    vs = 5 * CM3
    p2 = expansion_pressure(vs, P1, PA, fit.vc, fit.vr)
    v, u = fit.sample_volume_with_u(P1, p2, PA, u_p=5.0)
    assert v == pytest.approx(vs, rel=1e-9)
    # source: uncertainties package, correlated (Vc, Vr) and independent P1, P2
    vc_u, vr_u = unc.correlated_values([fit.vc, fit.vr], fit.cov)
    p1_u, p2_u = unc.ufloat(P1, 5.0), unc.ufloat(p2, 5.0)
    ref = vc_u - vr_u * (p2_u - PA) / (p1_u - p2_u)
    assert u == pytest.approx(ref.std_dev, rel=1e-4)


def test_real_gas_calibration_on_coolprop_runs():
    # true P2 from CoolProp Dmolar (helium reference EOS) mass balance; fit with the helium model
    t = 298.15

    def p2_true(v):
        vg = VC - v

        def d(p):
            return CP.PropsSI("Dmolar", "T", t, "P", p, "Helium")

        n = vg * d(P1) + VR * d(PA)
        return optimize.brentq(lambda p: (vg + VR) * d(p) - n, PA, P1, xtol=1e-9, rtol=1e-15)

    runs = [CalibrationRun(P1, p2_true(v), PA, v, t1=t) for v in SPHERES]
    real = fit_calibration(runs, gas="helium", u_p=5.0)
    assert real.vc == pytest.approx(VC, rel=1e-5) and real.vr == pytest.approx(VR, rel=1e-5)
    ideal = fit_calibration(runs, gas="ideal", u_p=5.0)
    # methods.md [D]: to first order non-ideality rescales Vr by (1 + B P1g/RT)
    from pycnoctl.controller.domain.gas import R, get_gas

    b = get_gas("helium").B(t)
    assert ideal.vr / VR - 1 == pytest.approx(b * 1.3e5 / (R * t), rel=0.1)
    # ... and calibrating at the same gas and fill pressure cancels most of it for a measurement
    v_ideal, _ = ideal.sample_volume_with_u(P1, p2_true(2 * CM3), PA)
    v_raw = VC - VR * (p2_true(2 * CM3) - PA) / (P1 - p2_true(2 * CM3))
    assert abs(v_ideal / (2 * CM3) - 1) < 0.1 * abs(v_raw / (2 * CM3) - 1)


def test_unweighted_fit_uses_scatter():
    rng = np.random.default_rng(11)
    fit = fit_calibration(runs_for(SPHERES * 2, noise=5.0, rng=rng))
    assert not fit.weighted and fit.notes
    assert math.isnan(fit.chi2) and fit.consistent()
    assert 0 < fit.u_vc < 1e-8


def test_insert_volume_uncertainty_enters_weights():
    runs = runs_for(SPHERES * 2, u_p=5.0)
    base = fit_calibration(runs)
    for r in runs:
        r.u_inserted = 1e-3 * CM3
    wider = fit_calibration(runs)
    assert wider.u_vc > base.u_vc and wider.u_vr > base.u_vr


@pytest.mark.parametrize(
    ("volumes", "message"),
    [([0.0], "at least 2 runs"), ([SPHERES[1]] * 3, "2 distinct inserted volumes"), ([], "at least 2 runs")],
)
def test_degenerate_input_raises(volumes, message):
    with pytest.raises(CalibrationError, match=message):
        fit_calibration(runs_for(volumes), u_p=5.0)


def test_bad_pressures_raise_calibration_error_naming_the_run():
    runs = runs_for(SPHERES[:2])
    runs[1].p2 = runs[1].p1 + 1.0
    with pytest.raises(CalibrationError, match="run 1"):
        fit_calibration(runs, u_p=5.0)
