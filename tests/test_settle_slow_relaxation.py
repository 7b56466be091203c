"""A relaxation too slow for the settle's time limit is refused by name, never turned into a number.

The porous specimen: 0.5 cm^3 of open pores filling with a 120 s time constant in a 12 cm^3 cell
(the issue's case: +0.51 % with 0 of 20 runs inside U before).  Common practice: a settle must wait
several time constants, so with the shipped max_time (600 s, five time constants, with the rule's
own decision time on top) the run cannot finish honestly; it must say why.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import yaml

from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.run.control import Controller
from pycnoctl.controller.run.sequence import resolve_sequence
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import Sample, check, load_sim_config


def test_porous_specimen_is_refused_naming_its_slow_relaxation(tmp_path: Path) -> None:
    base = load_sim_config(None)
    cfg = check(base.model_copy(update={"sample": Sample(solid_volume="5 cm^3", pore_volume="0.5 cm^3",
                                                         pore_tau="120 s")}))  # type: ignore[arg-type]
    inst = build_sim_instrument(cfg)
    with Catalog(tmp_path / "catalog.sqlite") as cat:
        s = execute(prepare(RunRequest("grain-volume"), inst), Controller(inst), root=tmp_path / "runs", catalog=cat)
    assert s["status"] == "fault" and s["volume_cm3"] is None
    message = s["fault"]["message"]
    m = re.search(r"time constant of about (\d+) s", message)
    assert m, message
    assert 60 <= int(m.group(1)) <= 240  # the pores' 120 s, as fitted from the settle's own trace
    assert "porous" in message and "max_time" in message
    # the time it names is one it did not have: beyond the 600 s max_time that ran out (it once named
    # 5 tau, about 550 s, less than the time already spent), and not wildly beyond it
    needed = re.search(r"would take about (\d+) s", message)
    assert needed, message
    assert 600 < int(needed.group(1)) < 1500, message


def test_porous_specimen_with_time_to_settle_is_within_its_u_or_refused(tmp_path: Path) -> None:
    """Given a max_time long enough for the drift rule to pass (900 s), the pores' remainder must not
    slip through: the window (10 s) sees a straight line, and the relaxation's remainder |dP/dt| tau
    (about 60 Pa at 0.5 Pa/s and 120 s) is several times the bound the budget takes from the window.
    Seen before the fix with a 600 s max_time on the accuracy bench: +0.38 %, 0 of 30 runs within U."""
    data = yaml.safe_load(resolve_sequence("grain-volume").read_text())
    data["settle"]["max_time"] = "900 s"
    data["cycles"] = {"count": 3, "discard": 1}
    seq = tmp_path / "patient.yaml"
    seq.write_text(yaml.safe_dump(data))
    base = load_sim_config(None)
    cfg = check(base.model_copy(update={"sample": Sample(solid_volume="5 cm^3", pore_volume="0.5 cm^3",
                                                         pore_tau="120 s")}))  # type: ignore[arg-type]
    inst = build_sim_instrument(cfg, seed=7)
    with Catalog(tmp_path / "catalog.sqlite") as cat:
        s = execute(prepare(RunRequest(str(seq)), inst), Controller(inst), root=tmp_path / "runs", catalog=cat)
    if s["status"] == "completed":
        # the truth: the solid's 5 cm^3 (the pores are open, so not part of the skeletal volume).  The
        # simulator's nominal volumes are its true ones, so the error is the pressures': compare it with
        # U without the chamber volumes' (uncalibrated, 0.5 %) rows, which would hide it
        rows = [r for r in s["budget"] if r["kind"] != "calibration"]
        u_pressures_cm3 = math.sqrt(sum(r["contribution"] ** 2 for r in rows)) * 1e6
        assert abs(s["volume_cm3"] - 5.0) <= 2.0 * u_pressures_cm3, (s["volume_cm3"], u_pressures_cm3)
    else:
        message = s["fault"]["message"]
        assert "time constant of about" in message and "porous" in message, message


def test_a_vented_zero_waiting_for_the_pores_is_refused_naming_them_not_a_leak(tmp_path: Path) -> None:
    """The zero of a cycle settles the closed, vented system, into which a porous specimen gives back
    the gas it took up. Under the remainder rule that zero waits for the pores (a 2 Pa limit; a
    fixed 0.5 Pa/s slope limit passes it earlier) and runs out of time: the refusal must name the slow
    relaxation and the time it would need, as P1 and P2 do, not blame a leaking inlet. Failed before
    the fix (the message said "a leaking inlet or a thermal transient")."""
    data = yaml.safe_load(resolve_sequence("grain-volume").read_text())
    data["settle"].pop("max_drift", None)
    data["settle"]["max_remainder"] = "2 Pa"
    data["settle_baseline"] = {"max_time": "300 s"}  # the zero runs out of time first
    seq = tmp_path / "zero-waits.yaml"
    seq.write_text(yaml.safe_dump(data))
    base = load_sim_config(None)
    cfg = check(base.model_copy(update={"sample": Sample(solid_volume="5 cm^3", pore_volume="0.5 cm^3",
                                                         pore_tau="120 s")}))  # type: ignore[arg-type]
    inst = build_sim_instrument(cfg)
    with Catalog(tmp_path / "catalog.sqlite") as cat:
        s = execute(prepare(RunRequest(str(seq)), inst), Controller(inst), root=tmp_path / "runs", catalog=cat)
    assert s["status"] == "fault" and s["volume_cm3"] is None
    message = s["fault"]["message"]
    assert message.startswith("the vented system did not settle"), message
    m = re.search(r"time constant of about (\d+) s", message)
    assert m and 60 <= int(m.group(1)) <= 240, message  # the pores' 120 s
    assert "porous" in message and "leaking inlet" not in message
    needed = re.search(r"would take about (\d+) s", message)
    assert needed and int(needed.group(1)) > 300, message


def test_a_slow_thermal_relaxation_is_not_blamed_on_the_specimen(tmp_path: Path) -> None:
    """No pores, but a cell whose gas exchanges heat with its walls with a 150 s time constant (an
    invented, poorly conducting build). The refusal named "a porous sample" first; the pressure cannot
    tell pores from heat exchange (both relax in proportion to the step, with one sign), so it must name
    the instrument's cause alongside and say which run tells them apart."""
    base = load_sim_config(None)
    slow = {name: v.model_copy(update={"thermal_tau": 150.0}) for name, v in base.volumes.items()}
    cfg = check(base.model_copy(update={"volumes": slow}))
    inst = build_sim_instrument(cfg, seed=3)
    with Catalog(tmp_path / "catalog.sqlite") as cat:
        s = execute(prepare(RunRequest("grain-volume"), inst), Controller(inst), root=tmp_path / "runs", catalog=cat)
    assert s["status"] == "fault" and s["volume_cm3"] is None
    message = s["fault"]["message"]
    m = re.search(r"time constant of about (\d+) s", message)
    assert m and 60 <= int(m.group(1)) <= 400, message
    assert message.index("exchanging heat") < message.index("porous"), message
    assert "empty cell or a calibration sphere" in message
