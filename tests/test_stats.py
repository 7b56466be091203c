"""Cycle statistics against the Python statistics module and scipy.stats."""

from __future__ import annotations

import math
import statistics

import pytest

scipy_stats = pytest.importorskip("scipy.stats")

from pycnoctl.controller.maths.stats import MAD_TO_SIGMA, converged, cycle_stats, outliers, robust_z  # noqa: E402

VOLS = [5.0210, 5.0032, 5.0011, 5.0019, 5.0004, 5.0016]


def test_cycle_stats_with_discard():
    s = cycle_stats(VOLS, discard=1)
    kept = VOLS[1:]
    # source: Python statistics module (sample sd, n - 1)
    assert s.n == 5 and s.used_indices == (1, 2, 3, 4, 5)
    assert s.mean == pytest.approx(statistics.fmean(kept))
    assert s.sd == pytest.approx(statistics.stdev(kept))
    assert s.rsd == pytest.approx(statistics.stdev(kept) / statistics.fmean(kept))
    assert s.sem == pytest.approx(statistics.stdev(kept) / math.sqrt(5))


def test_cycle_stats_exclude_and_edges():
    s = cycle_stats(VOLS, exclude=[0])
    assert s.used_indices == (1, 2, 3, 4, 5)
    one = cycle_stats([5.0])
    assert one.n == 1 and math.isnan(one.sd)
    with pytest.raises(ValueError, match="no cycles left"):
        cycle_stats(VOLS, discard=6)


def test_converged_rule():
    # USP <699> style stop rule [M: from memory]: consecutive volumes agree within 0.2 %
    assert not converged(VOLS[:2], last_k=3, within_fraction=0.002)
    assert converged(VOLS, last_k=3, within_fraction=0.002)
    assert not converged(VOLS, last_k=3, within_fraction=0.0001)
    # the first cycle is 0.4 % high: including it breaks agreement
    assert not converged(VOLS, last_k=6, within_fraction=0.002)
    with pytest.raises(ValueError):
        converged(VOLS, last_k=1, within_fraction=0.002)


def test_mad_factor_vs_scipy():
    # source: scipy.stats.norm.ppf(0.75): 1/Phi^-1(3/4) makes the MAD a normal-sigma estimate
    assert pytest.approx(1 / scipy_stats.norm.ppf(0.75), rel=1e-12) == MAD_TO_SIGMA
    data = [1.0, 2.0, 3.0, 4.0, 100.0]
    # scipy.stats.median_abs_deviation with scale='normal'
    mad = scipy_stats.median_abs_deviation(data, scale="normal")
    assert robust_z(data)[-1] == pytest.approx((100.0 - 3.0) / mad)


def test_outliers_median_mad_rule():
    assert outliers(VOLS) == [0]
    assert outliers(VOLS[1:]) == []
    assert outliers([5.0, 5.0, 5.0, 5.0, 5.3]) == [4]  # MAD = 0 -> mean-absolute-deviation fallback
    assert outliers([5.0, 5.0, 5.0]) == []
    assert outliers([1.0, 9.0]) == []  # too few to judge


def test_outliers_need_a_deviation_the_cycles_could_show():
    # six cycles that agree to 1e-9 cm^3 (a clean simulator) against a per-cycle u of 1.6e-3 cm^3:
    # without the floor the MAD rule calls the 1e-9 differences outliers (common practice: an outlier
    # must stand out against the measurement's own uncertainty)
    a = 4.999941
    vols = [a, a + 1e-9, a - 1e-9, a + 2e-9, a - 2e-9, a + 2e-8]
    assert outliers(vols) != []
    assert outliers(vols, floor=1.6e-3) == []
    assert outliers([*vols[:5], 5.02], floor=1.6e-3) == [5]
