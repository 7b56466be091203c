"""The remainder rule (``max_remainder``): a settle is taken when the relaxation still to come, as a
fit of the settle since its valve event predicts it, is under a stated number of pascals - not when a
window's slope is under a rate.  Checked on synthetic relaxations whose asymptote is known (the
exponential relaxation of a gas to its wall after a fill or an expansion is the textbook model of gas
pycnometry: common practice), on the turning point that fooled one-window fits, and end to end: live
and replay decide alike, and a noise-free demo instrument is measured sooner than by the drift rule."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.maths.settle import SettleCriteria, SettleDetector, SettleStatus
from pycnoctl.controller.run.engine import criteria
from pycnoctl.controller.run.sequence import load_sequence, resolve_sequence

ROOT = Path(__file__).resolve().parent.parent
P_INF = 109_686.0


def _rule(limit: float = 5.0, u_p: float = 0.5, window: float = 10.0) -> SettleCriteria:
    return SettleCriteria(window=window, max_drift=None, min_time=5.0, max_time=600.0, extrapolate=False,
                          u_p=u_p, max_remainder=limit)


def _drift_rule(u_p: float = 0.5) -> SettleCriteria:
    return SettleCriteria(window=10.0, max_drift=0.5, min_time=5.0, max_time=600.0, extrapolate=False, u_p=u_p)


def _settle(crit: SettleCriteria, shape, noise: float = 0.0, seed: int = 0, dt: float = 0.1) -> SettleDetector:
    rng = np.random.default_rng(seed)
    det = SettleDetector(crit, 0.0)
    for i in range(1, int(crit.max_time / dt) + 2):
        t = i * dt
        p = shape(t) + (rng.normal(0.0, noise) if noise else 0.0)
        if det.feed(t, p) is not SettleStatus.WAITING:
            break
    return det


def _fill(t: float) -> float:
    """The gas warmed by a fill relaxing to the wall: 20 kPa, tau 2 s (the shipped demo's cell)."""
    return P_INF + 19_722.0 * math.exp(-t / 2.0)


def test_a_clean_relaxation_is_taken_once_its_remainder_is_small_and_sooner_than_by_the_drift_rule() -> None:
    det = _settle(_rule(5.0), _fill)
    assert det.status is SettleStatus.SETTLED and det.method == "fitted"
    error = det.estimate - P_INF
    assert 0.0 <= error <= det.remainder <= 5.0  # what is left is what it says (the fit's bound)
    drift = _settle(_drift_rule(), _fill)
    assert det.elapsed <= 0.75 * drift.elapsed, (det.elapsed, drift.elapsed)  # 21.6 s against 31.0 s


@pytest.mark.parametrize("noise", [5.0, 20.0])
def test_a_noisy_relaxation_ends_within_its_stated_remainder_and_noise(noise: float) -> None:
    for seed in range(8):
        det = _settle(_rule(5.0, u_p=noise), _fill, noise=noise, seed=seed)
        assert det.status is SettleStatus.SETTLED, seed
        assert abs(det.estimate - P_INF) <= det.remainder + 3.0 * det.u_estimate, (seed, det.estimate - P_INF)


def test_a_slower_relaxation_is_waited_for_not_cut_short() -> None:
    """tau 30 s, 3 kPa, 8 Pa noise: the window sees a line; the fit of the settle sees the curve."""
    def slow(t: float) -> float:
        return P_INF + 3000.0 * math.exp(-t / 30.0)
    for seed in range(4):
        det = _settle(_rule(5.0, u_p=8.0), slow, noise=8.0, seed=seed)
        assert det.status is SettleStatus.SETTLED
        assert abs(det.estimate - P_INF) <= det.remainder + 3.0 * det.u_estimate, (seed, det.estimate - P_INF)
        assert det.elapsed >= 30.0 * math.log(3000.0 / 5.0) * 0.8  # about when 5 Pa are left: 192 s


def test_the_top_of_a_turning_point_is_not_taken_for_a_settled_gas() -> None:
    """After an expansion into a slow volume the pressure rises for about 40 s, then falls for minutes
    (the cell's gas warming with 30 s, the volume's cooling with 39 s; measured on the accuracy bench's
    slow-thermal instrument).  At the top a window's slope is zero and a fit of the bend alone looks
    sound: taken there, P2 was 736 Pa off.  The rule must wait for one relaxation to be left."""
    def turn(t: float) -> float:
        return P_INF + 5000.0 * (math.exp(-t / 39.0) - math.exp(-t / 30.0)) * 4.0
    for seed in range(3):
        det = _settle(_rule(5.0, u_p=8.0), turn, noise=8.0, seed=seed)
        assert det.status is SettleStatus.SETTLED
        assert det.elapsed > 120.0, det.elapsed  # well past the top (about 37 s)
        assert abs(det.estimate - P_INF) <= det.remainder + 3.0 * det.u_estimate + 2.0, det.estimate - P_INF


def test_a_wandering_lab_does_not_keep_a_settled_gas_waiting() -> None:
    """A relaxation on top of a lab that wanders (a 6 Pa wave of 20 minutes, as the shipped noisy
    simulator's lab does) bends a long settle by a pascal or two, more than one exponential explains at
    8 Pa of noise: the rule must still decide, by the slope with that misfit added, not time out."""
    def wander(t: float) -> float:
        return _fill(t) + 6.0 * math.sin(2.0 * math.pi * t / 1200.0)
    for seed in range(3):
        det = _settle(_rule(2.0, u_p=8.0), wander, noise=8.0, seed=seed)
        assert det.status is SettleStatus.SETTLED, seed
        truth = wander(det.decided_at or 0.0)
        assert abs(det.estimate - truth) <= det.remainder + 3.0 * det.u_estimate, (seed, det.estimate - truth)


def test_a_bound_on_a_long_time_constant_judges_a_slope_resolved_for_it() -> None:
    """After an expansion into a slow volume the pressure is two relaxations of opposite sign (here the
    two a simulated 30 s thermal instrument's P2 fitted to: +2889 Pa at 61.5 s, -2879 Pa at 30.3 s),
    and a lab that wanders by 2 Pa over a minute and a half leaves one exponential a misfit: the rule
    bounds the remainder by |slope| x the fit's 60 s. Over the window (16 s, resolved for three 10 s
    windows) an 8 Pa gauge's slope carries 0.13 Pa/s of noise alone, 8 Pa once times 60 s - the 8 Pa
    limit itself, so a hold survives only by chance: 6 of these 10
    settles ran to the 600 s limit on the revision before, the gas within 3 Pa of its end from 430 s.
    The slope over the stretch that resolves the longer time constant decides them all."""
    def shape(t: float) -> float:
        wander = 2.0 * math.sin(2.0 * math.pi * t / 90.0)
        return P_INF + 2889.0 * math.exp(-t / 61.5) - 2879.0 * math.exp(-t / 30.3) + wander
    for seed in range(10):
        det = _settle(_rule(2.0, u_p=8.0), shape, noise=8.0, seed=seed)
        assert det.status is SettleStatus.SETTLED, seed
        truth = shape(det.decided_at or 0.0)
        assert abs(det.estimate - truth) <= det.remainder + 3.0 * det.u_estimate, (seed, det.estimate - truth)


def test_a_slower_relaxation_hidden_under_the_noise_is_in_the_stated_remainder() -> None:
    """60 Pa relaxing with 40 s under the fill's 2 s one, at 8 Pa of noise, bends the settle less than the
    noise, so the fit of one exponential is not refused; but over the span fitted it falls 0.8 Pa/s, a
    straight line six standard errors from none.  Without the line under the fit the rule took it 24-35 Pa
    off with 7-8 Pa stated (the drift rule: 12-18 Pa off)."""
    def hidden(t: float) -> float:
        return _fill(t) + 60.0 * math.exp(-t / 40.0)
    for seed in range(3):
        det = _settle(_rule(2.0, u_p=8.0), hidden, noise=8.0, seed=seed)
        assert abs(det.estimate - P_INF) <= det.remainder + 3.0 * det.u_estimate, (seed, det.estimate - P_INF)


def test_a_steady_leak_is_not_taken() -> None:
    """No relaxation, only a straight fall of 1 Pa/s: what is left cannot be bounded, the settle times out."""
    det = _settle(SettleCriteria(window=10.0, max_drift=None, min_time=5.0, max_time=120.0, extrapolate=False,
                                 u_p=5.0, max_remainder=5.0), lambda t: P_INF - 1.0 * t, noise=5.0)
    assert det.status is SettleStatus.TIMED_OUT


def test_the_rule_replaces_max_drift_and_reads_pascals(tmp_path: Path) -> None:
    data = yaml.safe_load(resolve_sequence("grain-volume").read_text())
    data["settle"]["max_remainder"] = "5 Pa"
    data["settle_expanded"] = {"max_remainder": 2}  # a bare number is Pa, here as in the merged block
    path = tmp_path / "remainder.yaml"
    path.write_text(yaml.safe_dump(data))
    seq = load_sequence(path)
    filled, expanded = criteria(seq.settle_filled, 8.0), criteria(seq.settle_expanded, 8.0)
    # the settle block is validated again when an override merges into it: 5 Pa must stay 5 Pa
    # (read as a bare number in bar it once became 500 kPa)
    assert filled.max_remainder == 5.0 and filled.max_drift is None
    assert expanded.max_remainder == 2.0


@pytest.mark.parametrize("config", ["clean", "noisy"])
def test_live_and_replay_decide_alike_under_the_rule(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                     config: str) -> None:
    data = yaml.safe_load(resolve_sequence("grain-volume").read_text())
    data["settle"]["max_remainder"] = "5 Pa"
    seq = tmp_path / "remainder.yaml"
    seq.write_text(yaml.safe_dump(data))
    main(["run", str(seq), "--sim", str(ROOT / "sim" / "configs" / f"{config}.yaml"), "--seed", "2",
          "--data", str(tmp_path), "--json", "--quiet"])
    live = json.loads(capsys.readouterr().out)
    main(["analyze", live["run_id"], "--data", str(tmp_path), "--json"])
    replay = json.loads(capsys.readouterr().out)
    # the noisy simulator's specimen keeps relaxing for minutes: a fault, named, is a fair outcome there;
    # what is checked is that the record replays to the same decisions either way
    assert live["status"] == "completed" or config == "noisy", live.get("fault")
    assert replay["volume_cm3"] == live["volume_cm3"] and replay["volume_u_cm3"] == live["volume_u_cm3"]
    assert [c["p1_gauge_pa"] for c in replay["cycles"]] == [c["p1_gauge_pa"] for c in live["cycles"]]
    assert [c["settle1_s"] for c in replay["cycles"]] == [c["settle1_s"] for c in live["cycles"]]


@pytest.mark.parametrize("seed", range(40))
def test_any_relaxation_ends_in_a_decision_with_a_finite_value_and_bound(seed: int) -> None:
    """Random relaxations (one or two exponentials of either sign, 0.5-200 s, 0-30 Pa of noise, a steady
    drift now and then): the rule never raises, always ends (settled or timed out at max_time), and a
    settled value is finite with a finite, non-negative stated remainder."""
    rng = np.random.default_rng(seed)
    a1, a2 = rng.choice([-1, 1]) * 10 ** rng.uniform(0, 4.5), rng.choice([-1, 1]) * 10 ** rng.uniform(-1, 2.5)
    t1, t2 = 10 ** rng.uniform(-0.3, 1.5), 10 ** rng.uniform(0.5, 2.3)
    slope = rng.choice([0.0, rng.normal(0.0, 0.3)])
    noise = float(rng.choice([0.0, rng.uniform(0.5, 30.0)]))

    def shape(t: float) -> float:
        return P_INF + a1 * math.exp(-t / t1) + a2 * math.exp(-t / t2) + slope * t

    crit = SettleCriteria(window=float(rng.choice([3.0, 10.0])), max_drift=None, min_time=2.0, max_time=240.0,
                          extrapolate=bool(rng.integers(2)), u_p=max(noise, 1.0),
                          max_remainder=float(rng.choice([1.0, 5.0, 20.0])))
    det = _settle(crit, shape, noise=noise, seed=seed)
    assert det.status in (SettleStatus.SETTLED, SettleStatus.TIMED_OUT)
    if det.status is SettleStatus.SETTLED:
        assert math.isfinite(det.estimate) and math.isfinite(det.remainder) and det.remainder >= 0.0


def test_a_settle_the_fit_has_decided_is_held_for_two_refits_not_half_a_window() -> None:
    """An expansion's small, fast relaxation (500 Pa, tau 1 s) is over when the 10 s window fills; the
    fit of the settle says so at every refit. The hold is then two refits (one second apart), as a
    turning point would show in that fit as misfit: taken at about 12 s, not at 15 s as with half a
    window (the shipped demo's P2 and zeros waited so)."""
    det = _settle(_rule(2.0), lambda t: P_INF + 500.0 * math.exp(-t / 1.0))
    assert det.status is SettleStatus.SETTLED and det.method == "fitted"
    assert 10.0 <= det.elapsed <= 12.5, det.elapsed
    assert abs(det.estimate - P_INF) <= det.remainder
