"""The zero and the imbalance the transducer cannot see.

Physics (first law for a gas in a rigid chamber exchanging heat with its wall, linearised; ideal gas;
common practice): the vent cools both chambers' gas; closed again, the pair warms at one pressure,
each gas at its own rate, and the one that warms faster is compressed above its wall while the other
is still below it.  The pressure shows only the volume-weighted sum of the two deviations; the
expansion volume, closed off at the fill, carries its own.  In the slow mode of the two-chamber model
that own part is 1 / (a_x + a_c v_c / v_x) times the pressure's remainder (about 5 here; without bound
as the time constants meet), so the zero's fitted remainder cannot bound it - the measurer waits until
the vent's cooling, decaying with the slowest relaxation the cycle resolved, is under max_remainder.

Checked on the simulator, whose chambers relax by the same law, against its own state: the expansion
volume's gas temperature when the fill closes it off.
"""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest

import pycnoctl.controller.maths.cycle as cycle_mod
from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.maths.cycle import CycleMeasurer
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.run.control import Controller
from pycnoctl.controller.run.engine import cycle_plan
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import load_sim_config

# An invented bench: a 20 cm^3 cell relaxing in 20 s, a 10 cm^3 expansion volume in 26 s, nitrogen, 8 Pa
# of transducer noise (the noise floor lets the zero be decided sooner, with more hidden).
SEQ = """format: pycnoctl-sequence/1
name: hidden-imbalance
kind: measure
gas: nitrogen
purge: {pulses: 1, pressure: 1.0 bar, hold: 1 s, vent: 2 s}
fill: {target: 1.30 bar, timeout: 60 s, overshoot: 0.05 bar}
settle: {window: 10 s, max_remainder: 2 Pa, min_time: 5 s, max_time: 600 s, on_timeout: fault}
expand: {volume: small}
vent: {time: 15 s, timeout: 60 s, baseline_tolerance: 1 kPa}
cycles: {count: 4, discard: 1}
"""
MAX_REMAINDER = 2.0  # Pa, as in SEQ


def _config() -> Any:
    cfg = load_sim_config(None)
    vols = dict(cfg.volumes)
    vols["cell"] = vols["cell"].model_copy(update={"volume": 20e-6, "thermal_tau": 20.0})
    vols["small"] = vols["small"].model_copy(update={"volume": 10e-6, "thermal_tau": 26.0})
    ins = cfg.instruments.model_copy(update={"pressure": cfg.instruments.pressure.model_copy(update={"noise": 8.0})})
    return cfg.model_copy(update={"gas": "nitrogen", "volumes": vols, "instruments": ins, "seed": 11,
                                  "sample": cfg.sample.model_copy(update={"solid_volume": 6e-6})})


def _run(tmp: Path, monkeypatch: pytest.MonkeyPatch, seq: str = SEQ) -> tuple[list[float], list[dict[str, Any]]]:
    """(Pa the expansion volume's own gas had still to move when each fill closed it off, the cycles)."""
    (tmp / "seq.yaml").write_text(seq)
    inst = build_sim_instrument(_config())
    bench = inst.extras["sim"]
    hidden: list[float] = []
    ctl = Controller(inst)
    emit = ctl.emit

    def watch(kind: str, data: dict[str, Any]) -> None:
        if kind == "cycle":  # the fill begins: the expansion volume is about to be closed off
            net, i = bench.net, bench.node_index["small"]
            wall = bench.lab_temperature(bench.clock.now())
            hidden.append(net.P[i] * (wall - net.T[i]) / net.T[i])
        emit(kind, data)

    monkeypatch.setattr(ctl, "emit", watch)
    cat = Catalog(tmp / "catalog.sqlite")
    try:
        s = execute(prepare(RunRequest(tmp / "seq.yaml", sample_id="imb"), inst), ctl, root=tmp / "runs",
                    catalog=cat)
    finally:
        cat.close()
        inst.close()
    assert s["status"] == "completed", s.get("fault")
    return hidden, s["cycles"]


def test_the_expansion_volume_is_closed_off_within_max_remainder_of_its_own_end(tmp_path, monkeypatch) -> None:
    hidden, cycles = _run(tmp_path, monkeypatch)
    after_a_cycle = hidden[1:]  # the first zero follows the purge: no cycle's vent to bound it by
    assert len(after_a_cycle) >= 3
    assert max(abs(h) for h in after_a_cycle) <= MAX_REMAINDER, after_a_cycle
    # and the zero's stated remainder covers it (k = 2)
    for h, c in zip(after_a_cycle, cycles[1:], strict=False):
        assert abs(h) <= 2.0 * c["u_baseline_relax_pa"], (h, c["u_baseline_relax_pa"])


def test_without_the_hold_the_pressure_hides_a_larger_imbalance(tmp_path, monkeypatch) -> None:
    """The premise: the zero's own remainder rule alone closes the expansion volume off further from its
    end than max_remainder, though the pressure it reads is within it."""
    monkeypatch.setattr(cycle_mod, "IMBALANCE_HOLD_SHARE", 0.0)
    hidden, _ = _run(tmp_path, monkeypatch)
    assert np.max(np.abs(hidden[1:])) > 1.25 * MAX_REMAINDER, hidden  # 3.0-3.1 Pa; with the hold 0.2-0.4


def test_a_hold_cut_short_by_max_time_leaves_the_rest_in_the_zeros_u(tmp_path, monkeypatch) -> None:
    """A baseline max_time too short to wait the imbalance out (the visible relaxation alone needs about
    240 s here, the hold would go on past 80 % of 270 s): the zero is taken without a time-out, 3.0-3.1
    Pa hidden as without the hold, and its stated remainder grows to cover it (10 Pa)."""
    short = SEQ + "settle_baseline: {max_time: 270 s}\n"
    hidden, cycles = _run(tmp_path, monkeypatch, short)
    after_a_cycle = hidden[1:]
    assert max(abs(h) for h in after_a_cycle) > MAX_REMAINDER  # the premise: the hold could not finish
    for h, c in zip(after_a_cycle, cycles[1:], strict=False):
        assert abs(h) <= 2.0 * c["u_baseline_relax_pa"], (h, c["u_baseline_relax_pa"])


def _vent_bound(gas: str, gauge: float, lab: float, temp: float) -> float:
    """Pa: the bound a measurer records when a vent starts from ``gauge`` (the settle before it)."""
    settle = SimpleNamespace(window=10.0, max_drift=None, max_remainder=2.0, min_time=5.0, max_time=600.0,
                             extrapolate=False)
    seq = SimpleNamespace(settle_baseline=settle, settle_filled=settle, settle_expanded=settle,
                          cycles=SimpleNamespace(discard=1))
    m = CycleMeasurer(cycle_plan(seq, chambers=ChamberCalibration(12e-6, 8e-6), gas=gas, u_p=8.0, u_t=0.01,
                                 volume_name="small"))
    m.take_sample("settle_expanded", 0.0, gauge, lab, temp)
    m.take_sample("vent", 0.1, gauge, lab, temp)
    ((_, bound),) = m._vents
    return bound


@pytest.mark.parametrize("gas, fluid", [("helium", "Helium"), ("nitrogen", "Nitrogen"), ("argon", "Argon")])
def test_the_vents_cooling_bounds_the_isentropic_one_of_a_reference_equation_of_state(gas, fluid) -> None:
    """The bound the hold starts from: the lab pressure times the vent's adiabatic cooling (Poisson's
    relation for an ideal gas), against the real gas's isentropic expansion from CoolProp (reference
    equations of state), within 2 % of it from 0.3 to 1.5 bar gauge."""
    CP = pytest.importorskip("CoolProp.CoolProp")
    lab, t0 = 101_325.0, 295.15
    for gauge in (30e3, 60e3, 150e3):
        bound = _vent_bound(gas, gauge, lab, t0)
        s = CP.PropsSI("S", "P", lab + gauge, "T", t0, fluid)
        t_end = CP.PropsSI("T", "P", lab, "S", s, fluid)
        reference = lab * (t0 - t_end) / t0
        assert bound == pytest.approx(reference, rel=0.02), (gauge, bound, reference)


def test_a_gas_without_a_known_gamma_takes_the_larger_bound() -> None:
    """(g - 1)/g < 1 for every gas, so lab x (1 - lab/P) bounds any adiabatic cooling from above."""
    bound = _vent_bound("no-such-gas", 50e3, 101_325.0, 295.0)
    assert bound == pytest.approx(101_325.0 * 50e3 / 151_325.0)
