"""The two-relaxation fit behind the remainder rule's model selection (controller/maths/twoexp.py).

References: scipy.optimize.curve_fit (an independent least-squares solver; its covariance, scaled by
the residual variance, is the textbook one) for the fitted parameters and the propagated uncertainty
of what is left after the last sample; a Monte Carlo of fresh noise for whether that uncertainty is
honest.  The shapes - a fast and a slow relaxation of opposite sign, 8 s and 60 s - are those of a
gas expanded into a volume whose gas relaxes more slowly than the cell's (common practice: thermal
time constants of seconds for small chambers, up to a minute for large or poorly conducting ones).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import curve_fit

from pycnoctl.controller.maths.twoexp import fit_two_exponentials


def model(s: np.ndarray, c: float, a1: float, a2: float, t1: float, t2: float) -> np.ndarray:
    return c + a1 * np.exp(-s / t1) + a2 * np.exp(-s / t2)


T = np.linspace(100.0, 300.0, 60)  # block means over the last two thirds of a 300 s settle
TRUE = (1000.0, 40.0, -30.0, 8.0, 60.0)  # p_inf, A1, A2 at the first point, tau1, tau2


def truth(t: np.ndarray) -> np.ndarray:
    s = t - t[0]
    c, a1, a2, t1, t2 = TRUE
    return model(s, c, a1, a2, t1, t2)


def test_noise_free_recovers_the_relaxations() -> None:
    f = fit_two_exponentials(T, truth(T))
    assert f is not None and f.sound
    assert f.taus == pytest.approx((8.0, 60.0), rel=1e-4)
    assert f.p_inf == pytest.approx(1000.0, abs=1e-4)
    left = 1000.0 - truth(T)[-1]
    assert f.left == pytest.approx(left, abs=1e-4)
    assert f.at_last == pytest.approx(truth(T)[-1], abs=1e-4)


def test_agrees_with_curve_fit_on_noisy_data() -> None:
    rng = np.random.default_rng(3)
    p = truth(T) + rng.normal(0.0, 0.5, T.size)
    f = fit_two_exponentials(T, p)
    assert f is not None
    s = T - T[0]
    popt, pcov = curve_fit(model, s, p, p0=(1000.0, 40.0, -30.0, 8.0, 60.0), maxfev=20000)
    assert f.p_inf == pytest.approx(popt[0], abs=1e-3)
    assert f.taus == pytest.approx((popt[3], popt[4]), rel=1e-3)
    # what is left after the last sample and its uncertainty, propagated through curve_fit's covariance
    _, a1, a2, t1, t2 = popt
    e1, e2 = math.exp(-s[-1] / t1), math.exp(-s[-1] / t2)
    g = np.array([0.0, e1, e2, a1 * s[-1] / t1**2 * e1, a2 * s[-1] / t2**2 * e2])
    assert f.left == pytest.approx(-(a1 * e1 + a2 * e2), abs=1e-3)
    assert f.u_left == pytest.approx(math.sqrt(g @ pcov @ g), rel=0.02)
    assert f.u_p_inf == pytest.approx(math.sqrt(pcov[0, 0]), rel=0.02)


def test_stated_uncertainty_of_what_is_left_covers_the_truth() -> None:
    """Monte Carlo: 300 fresh noise draws; (left - true left) / u_left has an SD near 1."""
    rng = np.random.default_rng(11)
    true_left = 1000.0 - truth(T)[-1]
    z = []
    for _ in range(300):
        f = fit_two_exponentials(T, truth(T) + rng.normal(0.0, 1.0, T.size))
        assert f is not None
        z.append((f.left - true_left) / f.u_left)
    sd = float(np.std(z))
    assert 0.8 < sd < 1.25, sd
    assert abs(float(np.mean(z))) < 0.2


def test_one_relaxation_gives_no_pair_or_one_that_still_says_what_is_left() -> None:
    """A single exponential gives the pair nothing to resolve: the two time constants run together, or one
    amplitude is lost in the other (no sound pair); where a pair is still taken, what it says is left is
    the truth within three of its standard errors."""
    s = T - T[0]
    p = 1000.0 - 30.0 * np.exp(-s / 40.0)
    f = fit_two_exponentials(T, p + np.random.default_rng(2).normal(0.0, 0.2, T.size))
    assert f is None or not f.sound or abs(f.left - (1000.0 - p[-1])) < 3.0 * f.u_left


def test_a_relaxation_slower_than_the_span_is_not_resolved() -> None:
    s = T - T[0]
    p = 1000.0 + 20.0 * np.exp(-s / 5.0) - 200.0 * np.exp(-s / 900.0)
    f = fit_two_exponentials(T, p)
    assert f is None or not f.sound


def test_too_few_points_or_bad_input() -> None:
    assert fit_two_exponentials(T[:9], truth(T)[:9]) is None
    bad = truth(T).copy()
    bad[4] = math.nan
    assert fit_two_exponentials(T, bad) is None
    assert fit_two_exponentials(T[::-1], truth(T)) is None
