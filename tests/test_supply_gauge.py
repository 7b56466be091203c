"""The optional supply gauge: read before every inlet opening; above ``max_supply_pressure`` (a regulator
that failed between two fills) the inlet stays closed and the run trips ``supply_pressure``."""

from __future__ import annotations

import json

import yaml

from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.run.control import Controller
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import DEFAULT_CONFIG, config_from_dict
from pycnoctl.sim.testing import make


def _run(tmp_path, **update):
    data = yaml.safe_load(DEFAULT_CONFIG.read_text(encoding="utf-8"))  # the shipped bench, metered inlet
    data["instruments"]["supply_gauge"] = True
    data["limits"] = {"max_supply_pressure": "2 bar"}
    data.update(update)
    cfg = config_from_dict(data)
    inst = build_sim_instrument(cfg)
    bench = inst.extras["sim"]
    with Catalog(tmp_path / "catalog.sqlite") as cat:
        prepared = prepare(RunRequest("quick-demo"), inst, cat)
        summary = execute(prepared, Controller(inst), root=tmp_path / "runs", catalog=cat)
    inst.close()
    return summary, bench


def test_a_sound_supply_lets_the_run_through(tmp_path):
    summary, bench = _run(tmp_path)
    assert summary["status"] == "completed"
    assert bench.supply_gauge(bench.clock.now()) < 2e5


def test_a_regulator_failed_between_fills_keeps_the_inlet_closed(tmp_path):
    # fails 1 s after the first measurement fill opens the inlet (the third opening: two purge pulses)
    fault = {"kind": "regulator_failure", "on_opening": {"valve": "inlet", "count": 3}, "delay": "1 s",
             "rate": "0.5 bar/s"}
    summary, bench = _run(tmp_path, faults=[fault])
    assert summary["status"] == "fault" and summary["fault"]["kind"] == "supply_pressure"
    assert "above max_supply_pressure" in summary["fault"]["message"]
    assert bench._openings["inlet"] == 3  # the next fill never opened it
    v = bench.actual_valves()
    assert v["inlet"] is False and v["vent"] is True
    (run,) = (tmp_path / "runs").iterdir()
    events = [json.loads(x) for x in (run / "events.jsonl").read_text().splitlines()]
    assert [e["interlock"] for e in events if e["kind"] == "trip"] == ["supply_pressure"]


def test_without_a_gauge_or_a_limit_nothing_is_read(tmp_path):
    inst = build_sim_instrument(make())
    assert inst.supply is None and inst.limits.max_supply_pressure is None
    inst.close()
