"""The accuracy bench's reading of its stated random u / run SD against sampling alone.

Reference: a sample variance of normal data with nu degrees of freedom is sigma^2 chi-square(nu)/nu
(any statistics text); checked here by Monte Carlo of exact budgets: 28 instruments, 27 degrees of
freedom each (the bench's 3 calibrations x 10 runs)."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
import bench_accuracy


def test_an_exact_budget_reads_as_exact_in_95_percent_of_benches() -> None:
    rng = np.random.default_rng(4)
    inside, outside, expected = 0, [], 0.0
    for _ in range(2000):
        sd = np.sqrt(rng.chisquare(27, 28) / 27)  # observed SD / true sigma, stated u = sigma
        f = bench_accuracy._random_u_figures([(1.0 / s, 27) for s in sd])
        inside += f["lo"] <= f["pooled"] <= f["hi"]
        outside.append(f["outside"])
        expected = f["expected"]
    assert inside / 2000 == pytest.approx(0.95, abs=0.015)  # binomial(2000, 0.95): SD 0.5 %
    assert float(np.mean(outside)) == pytest.approx(expected, rel=0.05)
    assert "28 instruments" in bench_accuracy._random_u_line([(1.0, 27)] * 28)


def test_a_budget_stated_a_fifth_too_large_is_told_apart() -> None:
    rng = np.random.default_rng(5)
    sd = np.sqrt(rng.chisquare(27, 28) / 27)
    f = bench_accuracy._random_u_figures([(1.2 / s, 27) for s in sd])
    assert f["pooled"] > f["hi"]
