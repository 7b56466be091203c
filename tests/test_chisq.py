"""The hand-made chi-square functions against scipy.stats.chi2 (the reference implementation)."""

from __future__ import annotations

import pytest
from scipy.stats import chi2

from pycnoctl.controller.maths.chisq import chi2_cdf, chi2_ppf, chi2_sf

DOFS = [1, 2, 3, 4, 5, 7, 10, 21, 22, 47, 100, 151, 300]


@pytest.mark.parametrize("k", DOFS)
def test_cdf_and_sf_agree_with_scipy(k: int) -> None:
    for x in [1e-6, 0.01, 0.3, 0.5 * k, k - 1.0, float(k), k + 1.5, 1.7 * k, 3.0 * k + 10, 8.0 * k + 50]:
        if x <= 0:
            continue
        ref_cdf, ref_sf = chi2.cdf(x, k), chi2.sf(x, k)
        assert chi2_cdf(x, k) == pytest.approx(ref_cdf, rel=1e-10, abs=1e-300), (x, k)
        assert chi2_sf(x, k) == pytest.approx(ref_sf, rel=1e-10, abs=1e-300), (x, k)


@pytest.mark.parametrize("k", DOFS)
def test_quantile_agrees_with_scipy(k: int) -> None:
    for p in [0.005, 0.01, 0.025, 0.5, 0.975, 0.99, 0.995]:
        assert chi2_ppf(p, k) == pytest.approx(chi2.ppf(p, k), rel=1e-10), (p, k)


def test_edges_and_refusals() -> None:
    assert chi2_cdf(0.0, 3) == 0.0 and chi2_sf(0.0, 3) == 1.0
    assert chi2_cdf(float("inf"), 3) == 1.0 and chi2_sf(float("inf"), 3) == 0.0
    for bad in (0, -1, 2.5):
        with pytest.raises(ValueError):
            chi2_sf(1.0, bad)  # type: ignore[arg-type]
    with pytest.raises(ValueError):
        chi2_ppf(1.0, 3)
