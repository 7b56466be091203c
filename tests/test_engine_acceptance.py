"""Acceptance of the sequence engine on the simulator: the main job end to end.

The simulated instruments' physics is checked against textbook results in tests/test_sim_*.py
(mass balance, first law, isentropic nozzle flow, Newton cooling); here the whole stack - drivers,
interlocks, state machine, settle detection, maths, record - has to recover the sample volume the
simulator was configured with, or stop safely when the instrument misbehaves.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
import yaml

from pycnoctl.controller.jobs.measurement import PreparedRun, RunRequest, execute, jsonable, prepare
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.runfolder import load_run
from pycnoctl.controller.run.control import Controller
from pycnoctl.controller.run.engine import TRANSITIONS, RunEngine
from pycnoctl.controller.run.sequence import load_sequence, resolve_sequence
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import config_from_dict, shipped_configs


def make(**top):
    """The shipped clean bench (metering-restrictor inlet) with top-level sections replaced."""
    data = yaml.safe_load(shipped_configs()["clean"].read_text(encoding="utf-8"))
    data.update(top)
    return config_from_dict(data)


def measure(tmp_path: Path, seq: str, sim=None, **request):
    inst = build_sim_instrument(sim)
    bench = inst.extras["sim"]
    tmp_path.mkdir(parents=True, exist_ok=True)
    catalog = Catalog(tmp_path / "catalog.sqlite")
    controller = Controller(inst)
    summary = execute(prepare(RunRequest(seq, **request), inst), controller, root=tmp_path / "runs",
                      catalog=catalog)
    return summary, bench, catalog, controller


def truth_cm3(bench) -> float:
    return bench.config.sample.solid_volume * 1e6


def test_clean_instrument_measures_a_known_sample_within_0_05_percent(tmp_path):
    summary, bench, catalog, _ = measure(tmp_path, "grain-volume", mass=19.62e-3)
    truth = truth_cm3(bench)
    assert summary["status"] == "completed"
    # the shipped sequence ends once its last 3 cycles agree (the result is their mean): on the clean
    # bench the first three already do, in under the 5 instrument minutes
    assert len(summary["cycles"]) == 3 and summary["n_kept"] == 3 and summary["converged"]
    assert summary["instrument_time_s"] < 300.0
    err = summary["volume_cm3"] - truth
    assert abs(err) / truth < 5e-4  # the acceptance figure
    assert abs(err) <= summary["volume_u_cm3"]  # and within its own expanded uncertainty (k=2)
    assert summary["k"] == 2
    assert summary["density_g_cm3"] == pytest.approx(19.62 / truth, rel=5e-4)
    row = catalog.get_run(summary["run_id"])
    assert row.status == "completed" and row.volume_m3 == pytest.approx(summary["volume_cm3"] * 1e-6)


def test_noisy_instrument_with_transients_converges_through_settle_detection(tmp_path):
    # thermal time constants of 6-9 s, a porous sample whose pores fill with a 40 s time constant,
    # transducer noise, zero offset and lag, lab drift
    summary, bench, _, _ = measure(tmp_path, "grain-volume", shipped_configs()["noisy"])
    truth = truth_cm3(bench)
    assert summary["status"] == "completed"
    assert abs(summary["volume_cm3"] - truth) / truth < 2e-3
    # Not asserted: |error| <= U.  Over seeds 1-8 this bench reads 0.09-0.13 % high with U near
    # 0.09 % (err/U 1.05-1.41 in seven of eight): the settle decision leaves part of the 40 s pore
    # filling undone, a one-sided error the budget carries only as |drift| tau / sqrt(3).  The
    # shipped seed passed that check once by chance (err/U 0.98); it is a known shortfall.
    settles = [c["settle1_s"] for c in summary["cycles"]]
    assert min(settles) > 60  # the detector waited for the pores, it did not stop at a fixed time


def test_leaky_instrument_is_caught(tmp_path):
    summary, *_ = measure(tmp_path, "grain-volume", shipped_configs()["leaky"])
    assert summary["status"] == "fault"
    assert summary["fault"]["kind"] == "settle_timeout"
    assert summary["volume_cm3"] is None  # no number from a run that never settled

    leak, *_ = measure(tmp_path / "leak", "leak-check", shipped_configs()["leaky"])
    assert leak["status"] == "completed" and leak["leak_ok"] is False
    assert leak["leak_rate_pa_s"] < -1.0  # falls faster than the sequence's 1 Pa/s allowance

    clean, *_ = measure(tmp_path / "clean", "leak-check")
    assert clean["leak_ok"] is True and abs(clean["leak_rate_pa_s"]) < 0.1


def ruptured_regulator(**limits):
    cfg = make(faults=[{"kind": "regulator_failure", "on_opening": {"valve": "inlet", "count": 2},
                        "delay": "0.5 s", "rate": "50 bar/s"}],
               limits={"max_pressure": "2.0 bar", "relief_setting": "3.0 bar", **limits})
    return cfg


def test_regulator_failure_trips_overpressure_on_the_first_sample_over_the_limit(tmp_path):
    inst = build_sim_instrument(ruptured_regulator(max_rise_rate="1e9 Pa/s"))
    bench = inst.extras["sim"]
    controller = Controller(inst)
    prepared = prepare(RunRequest("quick-demo"), inst)
    engine = RunEngine(prepared.sequence, inst, expansion_volume=prepared.expansion_volume)
    controller.start(engine)
    limit = inst.limits.max_pressure
    first_over = None
    while not engine.terminal and inst.clock.now() < 300:
        s = controller.tick()
        if first_over is None and s.gauge > limit:
            first_over = s.index
        inst.clock.sleep(inst.sample_period)
    trip = controller.monitor.latched
    assert trip is not None and trip.kind == "overpressure"
    assert first_over is not None and trip.sample_index + 1 == first_over  # the first bad sample
    assert engine.state == "fault"
    actual = bench.actual_valves()
    assert actual["inlet"] is False and actual["vent"] is True  # safe state reached at the valves
    assert all(actual[v] for v in inst.roles.expansion.values())
    inst.clock.sleep(5.0)
    assert abs(inst.pressure.read().value) < 2e3  # and it vented


def test_regulator_failure_with_the_shipped_limits_trips_on_rate_of_rise_first(tmp_path):
    summary, bench, _, _ = measure(tmp_path, "quick-demo", shipped_configs()["regulator_failure"])
    assert summary["status"] == "fault" and summary["fault"]["kind"] == "rise_rate"
    assert bench.actual_valves()["inlet"] is False


@pytest.mark.parametrize("rate", [5.0, 1.0, 0.25])
def test_a_transducer_that_updates_slower_than_it_is_read_is_refused_at_the_first_fill(tmp_path, rate):
    """A 0.25-5 Hz gauge read every 0.1 s holds its reading, then steps.  It tripped the rise-rate interlock
    at every fill (the held samples' apparent rate 2-3.6e5 Pa/s against 2e5); now the first fill's readings
    show it, and the run stops there, before any cycle, naming the update period and the cure.  Why refuse
    rather than measure: the settle rules take every sample as a new reading; with 8 Pa of noise a 1 Hz
    gauge's zero did not settle in 600 s on the accuracy bench's instrument, and a settle taken on held
    samples states too small an uncertainty (its regression counts ten samples for each reading)."""
    data = yaml.safe_load(shipped_configs()["clean"].read_text(encoding="utf-8"))
    data["instruments"]["pressure"]["update_rate"] = rate
    summary, bench, _, _ = measure(tmp_path, "quick-demo", config_from_dict(data))
    assert summary["status"] == "fault" and summary["fault"]["kind"] == "held_readings", summary.get("fault")
    message = summary["fault"]["message"]
    assert f"a new reading about every {1 / rate:.2g} s but is read every 0.1 s" in message
    assert "sample_period to at least" in message
    assert not summary["cycles"] and bench.actual_valves()["inlet"] is False


def test_a_transducer_that_updates_as_fast_as_it_is_read_measures(tmp_path):
    data = yaml.safe_load(shipped_configs()["clean"].read_text(encoding="utf-8"))
    data["instruments"]["pressure"]["update_rate"] = 10.0
    summary, bench, _, _ = measure(tmp_path, "quick-demo", config_from_dict(data))
    assert summary["status"] == "completed", summary.get("fault")
    assert abs(summary["volume_cm3"] - truth_cm3(bench)) <= summary["volume_u_cm3"]


def test_run_record_is_complete_and_reanalysable(tmp_path):
    summary, _, catalog, controller = measure(tmp_path, "quick-demo", sample_id="AL-0417")
    run = load_run(tmp_path / "runs" / summary["run_id"])
    assert run.n_samples == controller.index  # every tick is a row
    states = set(run.trace["state"])
    assert {"purge_fill", "purge_hold", "purge_vent", "vent", "baseline", "fill", "settle_filled", "expand",
            "settle_expanded", "done"} <= states
    # every purge pulse shows in the trace: one fill, hold, vent run of rows per pulse, in that order
    seq = load_sequence(resolve_sequence("quick-demo"))
    runs = [str(s) for i, s in enumerate(run.trace["state"]) if i == 0 or s != run.trace["state"][i - 1]]
    purge = [s for s in runs if s.startswith("purge")]
    assert purge == ["purge_fill", "purge_hold", "purge_vent"] * seq.purge.pulses
    kinds = [e["kind"] for e in run.events]
    assert kinds.count("state") >= 10 and "settled" in kinds
    # each taken pressure says what it was taken on (the quick demo's drift rule, or the remainder rule's
    # slope bound / fitted relaxations), so a re-reader can tell a measured end from a model's
    models = {e["model"] for e in run.events if e["kind"] == "settled"}
    assert models and models <= {"drift rule", "slope bound", "one relaxation", "two relaxations",
                                 "one relaxation, extrapolated", "two relaxations, extrapolated",
                                 "drift rule, extrapolated", "slope bound, extrapolated"}
    assert len(run.cycles) == 3
    stored = json.loads((tmp_path / "runs" / summary["run_id"] / "summary.json").read_text())
    assert stored["sequence_text"].startswith("# ") or "pycnoctl-sequence/1" in stored["sequence_text"]
    assert stored["results"]["volume_cm3"] == pytest.approx(summary["volume_cm3"])
    assert stored["instrument"]["chambers"]["cell"] == pytest.approx(12e-6)
    assert catalog.integrity_check() == "ok"
    assert [c.idx for c in catalog.get_cycles(summary["run_id"])] == [1, 2, 3]


@pytest.mark.parametrize(("fault", "kind"), [
    ({"kind": "transducer", "mode": "silent"}, "invalid_pressurised"),
    ({"kind": "transducer", "mode": "nan"}, "invalid_pressurised"),
    ({"kind": "transducer", "mode": "garbled"}, "invalid_pressurised"),
    ({"kind": "transducer", "mode": "frozen"}, "frozen"),
    ({"kind": "disconnect", "device": "pressure"}, "invalid_pressurised"),
    ({"kind": "disconnect", "device": "valves"}, "device_error"),
])
def test_faults_during_a_fill_reach_the_safe_state_and_latch(tmp_path, fault, kind):
    # the fault starts 1 s into the first measurement fill (the 3rd opening of the inlet in quick-demo)
    cfg = make(faults=[{**fault, "on_opening": {"valve": "inlet", "count": 3}, "delay": "1 s"}])
    summary, bench, _, controller = measure(tmp_path, "quick-demo", cfg)
    assert summary["status"] == "fault"
    assert summary["fault"]["kind"] == kind
    trip = controller.monitor.latched
    assert trip is not None and trip.kind == kind
    if kind != "device_error":  # with the board gone nothing can switch; the hardware's NC/NO must act
        assert bench.actual_valves()["inlet"] is False and bench.actual_valves()["vent"] is True
    else:
        assert trip.safe_state_ok is False  # and the record says the safe state was not confirmed


def test_a_reset_is_refused_while_the_condition_persists_and_never_restarts(tmp_path):
    cfg = make(faults=[{"kind": "disconnect", "device": "pressure", "on_opening": {"valve": "inlet", "count": 3},
                        "delay": "1 s", "duration": "30 s"}])
    summary, bench, _, controller = measure(tmp_path, "quick-demo", cfg)
    assert summary["status"] == "fault"
    assert controller.reset() is False  # sensor still gone
    assert controller.monitor.latched is not None
    bench.advance(60.0)  # the fault clears; the system has vented
    assert controller.reset() is True
    for _ in range(50):  # the loop goes on: nothing restarts, no valve leaves the safe state
        controller.tick()
        inst = controller.instrument
        inst.clock.sleep(inst.sample_period)
    assert controller.engine is None
    assert bench.actual_valves()["inlet"] is False and bench.actual_valves()["vent"] is True


def test_stuck_open_inlet_is_caught(tmp_path):
    # the inlet seat sticks open when the first measurement fill closes it
    cfg = make(faults=[{"kind": "valve_stuck", "valve": "inlet", "open": True,
                        "on_opening": {"valve": "inlet", "count": 3}, "delay": "3 s"}])
    summary, *_ = measure(tmp_path, "quick-demo", cfg)
    assert summary["status"] == "fault"
    assert summary["fault"]["kind"] == "inlet_leak"  # pressure rising with the inlet commanded closed


def test_an_exception_inside_a_step_reaches_the_safe_state(tmp_path, monkeypatch):
    def boom(self, s):
        raise ZeroDivisionError("simulated bug")

    monkeypatch.setattr(RunEngine, "_step_settle_filled", boom)
    summary, bench, _, controller = measure(tmp_path, "quick-demo")
    assert summary["status"] == "fault" and summary["fault"]["kind"] == "exception"
    assert "ZeroDivisionError" in summary["fault"]["message"]
    assert bench.actual_valves()["inlet"] is False and bench.actual_valves()["vent"] is True
    assert controller.monitor.latched.kind == "exception"


def test_state_machine_table_has_no_auto_transitions_and_fault_from_everywhere():
    inst = build_sim_instrument()
    prepared = prepare(RunRequest("grain-volume"), inst)
    engine = RunEngine(prepared.sequence, inst, expansion_volume=prepared.expansion_volume)
    # transitions would add to_<state>() for every state; with them off none exists (to_fault is our own
    # method that goes through the 'fail' trigger)
    assert not any(hasattr(engine, f"to_{s}") for s in ("idle", "purge", "vent", "fill", "done", "aborted"))
    fail = next(t for t in TRANSITIONS if t["trigger"] == "fail")
    assert set(fail["source"]) == {s for s in engine.machine.states if s not in ("done", "fault", "aborted")}
    engine._fire("filled")  # not a trigger of idle: logged and ignored, the state stays
    assert engine.state == "idle"


def test_abort_keeps_the_record_and_the_safe_state(tmp_path):
    inst = build_sim_instrument()
    bench = inst.extras["sim"]
    catalog = Catalog(tmp_path / "c.sqlite")
    ticks = {"n": 0}

    def stop_after_a_while() -> bool:
        ticks["n"] += 1
        return ticks["n"] > 600  # a minute of instrument time, mid-cycle

    summary = execute(prepare(RunRequest("grain-volume"), inst), Controller(inst), root=tmp_path / "runs",
                      catalog=catalog, should_stop=stop_after_a_while)
    assert summary["status"] == "aborted"
    assert bench.actual_valves()["inlet"] is False and bench.actual_valves()["vent"] is True
    run = load_run(tmp_path / "runs" / summary["run_id"])
    assert run.n_samples > 600 and run.trace["state"][-1] == "aborted"
    assert catalog.get_run(summary["run_id"]).status == "aborted"
    assert set(run.trace["pressure_valid"]) == {"valid"}  # every recorded sample of a healthy run is valid
    assert not any(math.isnan(p) for p in run.trace["pressure_pa"])


def test_stop_on_converge_ends_the_run_early(tmp_path):
    from pycnoctl.controller.run.sequence import resolve_sequence

    data = yaml.safe_load(resolve_sequence("grain-volume").read_text(encoding="utf-8"))
    data["cycles"].update({"count": 8, "discard": 2, "stop_on_converge": True,
                           "converge": {"last": 3, "within": "0.05 %"}})
    seq = tmp_path / "converge.yaml"
    seq.write_text(yaml.safe_dump(data), encoding="utf-8")
    summary, *_ = measure(tmp_path / "run", str(seq))
    assert summary["status"] == "completed" and summary["converged"] is True
    assert len(summary["cycles"]) == 5  # two discarded, then three that agree
    assert summary["outliers"] == []


def test_inlet_stuck_closed_times_out_the_fill(tmp_path):
    # a transducer with some noise: a perfectly quiet one would (rightly) trip as frozen first
    cfg = make(faults=[{"kind": "valve_stuck", "valve": "inlet", "open": False, "at": "0 s"}],
               instruments={"pressure": {"node": "cell", "kind": "gauge", "full_scale": "3.5 bar",
                                         "noise": "0.05 mbar"}})
    summary, bench, _, _ = measure(tmp_path, "quick-demo", cfg)
    assert summary["status"] == "fault" and summary["fault"]["kind"] == "fill_timeout"
    assert bench.actual_valves()["vent"] is True


def test_vent_stuck_closed_times_out_the_vent(tmp_path):
    # the vent seat sticks shut after the first measurement fill; the run must not fill again on top
    cfg = make(faults=[{"kind": "valve_stuck", "valve": "vent", "open": False,
                        "on_opening": {"valve": "inlet", "count": 3}, "delay": "1 s"}])
    summary, bench, _, controller = measure(tmp_path, "quick-demo", cfg)
    assert summary["status"] == "fault" and summary["fault"]["kind"] == "vent_timeout"
    assert bench.actual_valves()["inlet"] is False
    assert controller.reset() is False  # still pressurised: the operator must vent by hand first


def test_a_silent_transducer_while_vented_goes_stale(tmp_path):
    inst = build_sim_instrument(make(faults=[{"kind": "transducer", "mode": "silent", "at": "3 s"}]))
    controller = Controller(inst)
    trip = None
    while trip is None and inst.clock.now() < 10.0:  # idle: no run, the interlocks still watch
        controller.tick()
        trip = controller.monitor.latched
        inst.clock.sleep(inst.sample_period)
    assert trip is not None and trip.kind == "stale"
    # stale_after after the last valid sample (taken one period before the transducer fell silent)
    assert 3.0 + inst.limits.stale_after - inst.sample_period <= trip.t <= 3.0 + inst.limits.stale_after


def test_automatic_expansion_volume_weighs_the_calibrated_volumes(tmp_path):
    # advisor rule (methods: f(x) smallest near Vr = 1.2 Vg): with a 5 cm^3 sample in a 12 cm^3 cell the
    # nominal 8 cm^3 'small' volume is the better one; if calibration says the volumes are the other way
    # round, the choice must follow the calibration, not the nominal numbers
    from pycnoctl.controller.record.catalog import CalibrationRecord

    inst = build_sim_instrument()
    catalog = Catalog(tmp_path / "c.sqlite")
    assert prepare(RunRequest("grain-volume"), inst, catalog).expansion_volume == "small"
    catalog.put_calibration(CalibrationRecord("small", "helium", 12e-6, 20e-6, instrument=inst.identity))
    catalog.put_calibration(CalibrationRecord("large", "helium", 12e-6, 8e-6, instrument=inst.identity))
    assert prepare(RunRequest("grain-volume"), inst, catalog).expansion_volume == "large"


@pytest.mark.parametrize("vent_stuck", [True, False])
def test_pressure_trapped_behind_a_vent_believed_open_trips_even_while_idle(vent_stuck):
    # a slowly leaking inlet (about 40 Pa/s into the cell, far below the inlet-leak rule's 400 Pa/s)
    # at rest: a working vent keeps the cell at ambient; a vent stuck shut lets it fill, and the
    # instrument's vent_timeout, not any sequence, must catch it
    faults = [{"kind": "valve_leak", "valve": "inlet", "conductance": "1e-8 m^3/s", "at": "0 s"}]
    if vent_stuck:
        faults.append({"kind": "valve_stuck", "valve": "vent", "open": False, "at": "0 s"})
    inst = build_sim_instrument(make(faults=faults, instruments={"pressure": {
        "node": "cell", "kind": "gauge", "full_scale": "3.5 bar", "noise": "0.05 mbar"}}))
    controller = Controller(inst)
    limit = inst.limits.vent_timeout
    while controller.monitor.latched is None and inst.clock.now() < 2 * limit:
        controller.tick()
        inst.clock.sleep(inst.sample_period)
    trip = controller.monitor.latched
    if not vent_stuck:
        assert trip is None
        return
    assert trip is not None and trip.kind == "vent_timeout"
    assert limit <= trip.t < limit + 2 * inst.sample_period  # the vent was commanded open at t = 0
    assert trip.value >= limit and "phase idle" in trip.message
    assert controller.reset() is False  # still pressurised


def test_the_cycle_done_event_carries_the_stored_cycle_result(tmp_path):
    """One SI cycle type end to end: what the cycle_done event carried is the summary's cycle, and the
    catalog holds the same SI numbers exactly (no cm3 round trip)."""
    inst = build_sim_instrument(None)
    catalog = Catalog(tmp_path / "catalog.sqlite")
    controller = Controller(inst)
    seen: list[dict] = []
    controller.listeners.append(lambda kind, data: seen.append(data) if kind == "cycle_done" else None)
    summary = execute(prepare(RunRequest("quick-demo"), inst), controller, root=tmp_path / "runs", catalog=catalog)
    assert summary["status"] == "completed" and len(summary["cycles"]) == 3
    assert [jsonable(d["result"]) for d in seen] == summary["cycles"]
    recorded = [e["result"] for e in load_run(tmp_path / "runs" / summary["run_id"]).events
                if e["kind"] == "cycle_done"]
    assert recorded == summary["cycles"]
    rows = catalog.get_cycles(summary["run_id"])
    assert [(r.p1, r.p2, r.volume) for r in rows] == [(c["p1_gauge_pa"], c["p2_gauge_pa"], c["volume_m3"])
                                                       for c in summary["cycles"]]
    run = catalog.get_run(summary["run_id"])
    assert run is not None and run.volume_m3 * 1e6 == summary["volume_cm3"]  # the RunResult's own m3


def test_only_the_last_vent_ends_at_ambient_without_waiting_for_the_gas_to_warm(tmp_path):
    """vent.time is for the next zero (the vented gas warms back to the wall while the vent is open);
    after the last cycle there is none, so that vent ends once the gauge is within the baseline
    tolerance and the run ends in the safe state with every vent open. Every earlier vent still lasts
    vent.time, also the one after the cycle on which a measurement converges early."""
    summary, bench, _, _ = measure(tmp_path, "grain-volume")
    assert summary["status"] == "completed" and summary["converged"] and len(summary["cycles"]) < 8
    events = load_run(tmp_path / "runs" / summary["run_id"]).events
    states = [(e["state"], e["t"]) for e in events if e["kind"] == "state"]
    vents = [(t, states[i + 1][1] - t) for i, (s, t) in enumerate(states[:-1]) if s == "vent"]
    seq = load_sequence(resolve_sequence("grain-volume"))
    assert len(vents) == len(summary["cycles"]) + 1  # the purge's last vent, then one after each cycle
    assert all(d >= seq.vent.time for _, d in vents[:-1])
    assert vents[-1][1] < seq.vent.time / 2, vents[-1]
    assert states[-1][0] == "done" and bench.actual_valves()["vent"]


def _short_window_sequence(tmp_path: Path, window: str, rule: str, on_timeout: str) -> Path:
    f = tmp_path / "short-window.yaml"
    f.write_text(f"""format: pycnoctl-sequence/1
name: short-window
kind: measure
fill: {{target: 1.3 bar, timeout: 30 s}}
settle: {{window: {window}, {rule}, min_time: 1 s, max_time: 8 s, on_timeout: {on_timeout}}}
expand: {{volume: small}}
vent: {{time: 2 s, timeout: 30 s}}
cycles: {{count: 1}}
""", encoding="utf-8")
    return f


@pytest.mark.parametrize("rule", ["max_drift: 2 Pa/s", "max_drift: auto", "max_remainder: 2 Pa"])
@pytest.mark.parametrize(("window", "held", "on_timeout"), [("0.05 s", 1, "fault"), ("0.15 s", 2, "accept")])
def test_a_settle_window_of_too_few_samples_faults_saying_so(tmp_path, rule, window, held, on_timeout):
    """Past prepare() (which refuses it) a window too short for the sample period still never ends in a
    NaN drift or a value without a standard error: the run faults naming the samples and the window
    needed, also where the sequence accepts a time-out (that took the two-sample value, u = 0)."""
    path = _short_window_sequence(tmp_path, window, rule, on_timeout)
    inst = build_sim_instrument()
    assert inst.sample_period == 0.1
    catalog = Catalog(tmp_path / "catalog.sqlite")
    prepared = PreparedRun(RunRequest(str(path)), load_sequence(path), "small")
    summary = execute(prepared, Controller(inst), root=tmp_path / "runs", catalog=catalog)
    assert summary["status"] == "fault" and summary["cycles"] == []
    message = summary["fault"]["message"]
    assert summary["fault"]["kind"] == "settle_timeout" and "nan" not in message
    assert message == (f"the vented system did not settle within 8 s - not settled: too few samples ({held} in "
                       f"the {window} window; the drift test needs at least 3); at one sample every 0.1 s the "
                       "window must be at least 0.2 s")
