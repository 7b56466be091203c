"""Expansion-volume advice: ranking follows the GUM propagation (methods.md f(x), optimum x near 1.21)."""

from __future__ import annotations

import numpy as np
import pytest

from pycnoctl.controller.maths.advisor import AdviceError, advise, f_factor, predicted_u
from pycnoctl.controller.maths.uncertainty import cycle_volume_budget
from pycnoctl.controller.maths.volume import expansion_pressure

CM3 = 1e-6
PA = 101325.0


def test_best_choice_is_near_x_1_21():
    # methods.md [D]: pick the expansion volume near 1.2 x the gas volume left in the loaded cell
    vc, vs = 100 * CM3, 60 * CM3  # Vg = 40 cm^3
    choices = {"small": 10 * CM3, "medium": 48 * CM3, "large": 150 * CM3}
    adv = advise(vs, vc, choices, p1_gauge=1.4e5, u_p=70.0)
    assert adv.best == "medium"
    assert adv.choices[0].name == "medium"
    assert adv.choices[0].x_ratio == pytest.approx(1.2)
    assert adv.choices[0].predicted_u <= adv.choices[1].predicted_u <= adv.choices[2].predicted_u


def test_prediction_equals_budget_and_f_of_x():
    vc, vs, vr, p1g, u_p = 10 * CM3, 5 * CM3, 7 * CM3, 1.4e5, 70.0
    u, p2g = predicted_u(vs, vc, vr, p1g, u_p)
    p2 = expansion_pressure(vs, PA + p1g, PA, vc, vr)
    assert p2g == pytest.approx(p2 - PA, rel=1e-12)
    b = cycle_volume_budget(PA + p1g, p2, PA, vc, vr, u_p1=u_p, u_p2=u_p)
    assert u == pytest.approx(b.combined, rel=1e-6)
    # methods.md [D]: pressure term alone u = Vg (u_P/P1g) f(x)
    assert u == pytest.approx((vc - vs) * u_p / p1g * f_factor(vr / (vc - vs)), rel=1e-12)


def test_calibration_covariance_per_volume_can_change_the_choice():
    vc, vs = 100 * CM3, 60 * CM3
    choices = {"medium": 48 * CM3, "large": 80 * CM3}
    poor = np.diag([0.2 * CM3, 0.2 * CM3]) ** 2
    good = np.diag([1e-4 * CM3, 1e-4 * CM3]) ** 2
    assert advise(vs, vc, choices, p1_gauge=1.4e5, u_p=70.0).best == "medium"
    adv = advise(vs, vc, choices, p1_gauge=1.4e5, u_p=70.0, cov_cal={"medium": poor, "large": good})
    assert adv.best == "large"


@pytest.mark.parametrize(
    ("vs", "vc", "choices"),
    [(12 * CM3, 10 * CM3, {"a": 7 * CM3}), (5 * CM3, 10 * CM3, {}), (5 * CM3, 10 * CM3, {"a": -1.0})],
)
def test_bad_input(vs, vc, choices):
    with pytest.raises(AdviceError):
        advise(vs, vc, choices, p1_gauge=1.4e5, u_p=70.0)


def test_the_settled_u_the_advisor_weighs_is_over_the_window_the_engine_will_use():
    """A fixed drift limit the noise cannot resolve over the stated window is met over a longer one
    (SettleDetector._resolving_span): 20 Pa of noise, 0.1 s samples, 0.5 Pa/s and a 10 s window need
    about 16 s, so the settled pressure's regression u is that of about 160 samples, not 100.  The
    end-point standard error of a straight-line fit, 2 u_p / sqrt(n), is the textbook regression result
    (common practice)."""
    from types import SimpleNamespace

    from pycnoctl.controller.jobs.measurement import _settled_u
    from pycnoctl.controller.maths.settle import resolving_span

    def seq(max_drift: object) -> SimpleNamespace:
        return SimpleNamespace(settle_expanded=SimpleNamespace(window=10.0, max_drift=max_drift, max_time=600.0,
                                                               max_remainder=None))

    inst = SimpleNamespace(sample_period=0.1, pressure_u=20.0, pressure_u_linearity=0.0)
    span = resolving_span(101, 0.1, 10.0, 0.5, 20.0, 300.0)
    assert 14.0 < span < 20.0
    assert _settled_u(seq(0.5), inst) == pytest.approx(2.0 * 20.0 / np.sqrt(span / 0.1))
    assert _settled_u(seq("auto"), inst) == pytest.approx(2.0 * 20.0 / np.sqrt(100.0))  # auto keeps it
    quiet = SimpleNamespace(sample_period=0.1, pressure_u=2.0, pressure_u_linearity=0.0)
    assert _settled_u(seq(0.5), quiet) == pytest.approx(2.0 * 2.0 / np.sqrt(100.0))  # resolved: as stated
