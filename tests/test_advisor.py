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
