"""The accuracy bench's physical floor of a settle (bench/settle_floor.py), on cases with a known answer.

References: an exponential relaxation A exp(-t / tau) falls below d at t = tau ln(A / d) (analytic); the
tolerances are checked against a central finite difference of the ideal-gas expansion equation
V = Vc - Vr / (P1 / P2 - 1) (Boyle's law, gauge pressures from the zero; methods.md)."""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
import settle_floor


def _volume(p0: float, p1: float, p2: float, vc: float, vr: float) -> float:
    return vc - vr / ((p1 - p0) / (p2 - p0) - 1.0)


@pytest.mark.parametrize(("p1", "p2", "vc", "vr"), [(130e3, 60e3, 12e-6, 8e-6), (200e3, 150e3, 60e-6, 25e-6)])
def test_the_tolerances_are_the_pressure_errors_worth_0_05_percent_of_the_volume(p1, p2, vc, vr):
    volume = _volume(0.0, p1, p2, vc, vr)
    tol = settle_floor.tolerances(p1, p2, volume, vr)
    h = 1e-3  # Pa
    slopes = {"baseline": (_volume(h, p1, p2, vc, vr) - _volume(-h, p1, p2, vc, vr)) / (2 * h),
              "settle_filled": (_volume(0.0, p1 + h, p2, vc, vr) - _volume(0.0, p1 - h, p2, vc, vr)) / (2 * h),
              "settle_expanded": (_volume(0.0, p1, p2 + h, vc, vr) - _volume(0.0, p1, p2 - h, vc, vr)) / (2 * h)}
    for k, dv_dp in slopes.items():
        assert abs(dv_dp) * tol[k] == pytest.approx(5e-4 * volume, rel=1e-6)


@pytest.mark.parametrize(("amplitude", "tau", "tolerance"), [(22e3, 2.0, 30.0), (-8e3, 30.0, 20.0), (500.0, 4.0, 13.0)])
def test_the_floor_of_an_exponential_is_where_it_falls_below_the_tolerance(amplitude, tau, tolerance):
    t = np.round(np.arange(0.0, 15 * tau, 0.1), 10)
    p = 1e5 + amplitude * np.exp(-t / tau)
    floor = settle_floor._floor(t, p, tolerance)
    assert floor == pytest.approx(tau * math.log(abs(amplitude) / tolerance), abs=0.1 + 1e-9)


def test_a_settle_already_within_its_tolerance_has_no_floor():
    t = np.arange(0.0, 10.0, 0.1)
    assert settle_floor._floor(t, 5.0 + 0.0 * t, 1.0) == 0.0


def test_the_run_time_with_each_settle_cut_to_its_floor():
    states = ["fill"] * 5 + ["settle_filled"] * 10 + ["expand"] * 2 + ["settle_expanded"] * 20 + ["vent"] * 3 \
        + ["baseline"] * 4 + ["fill"] * 2 + ["settle_filled"] * 6 + ["done"]
    trace = {"t": np.arange(len(states)) * 0.5, "state": states}
    spent, count = settle_floor.settle_times(trace)
    assert spent == pytest.approx({"baseline": 2.0, "settle_filled": 8.0, "settle_expanded": 10.0})
    assert count == {"baseline": 1, "settle_filled": 2, "settle_expanded": 1}
    floor = {"baseline": 1.0, "settle_filled": 1.5, "settle_expanded": 3.0}
    assert settle_floor.floor_run_seconds(100.0, spent, count, floor) == pytest.approx(100.0 - 20.0 + 1 + 3 + 3)
