"""Fault injection: an exception that is not a DeviceError, anywhere in a run, still ends in the safe state.

Safety rules (shared design notes): the safe state is asserted on any unhandled exception, first;
then the record says why; the run ends as a fault.  Each case raises a RuntimeError during a fill
(inlet open, cell above 0.3 bar gauge, on the simulator) and checks the simulator's TRUE valve
states, events.jsonl, the catalog row and what the CLI prints.  The reaction is printed (run
pytest with -s to see it): samples between the fault and the safe state, and wall-clock ms.
"""

from __future__ import annotations

import json
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.domain.devices import DeviceTimeout
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.runfolder import RunRecorder
from pycnoctl.controller.run.engine import RunEngine
from pycnoctl.drivers import simulated
from pycnoctl.drivers.guarded import SAFE_STATE_DEADLINE, apply_steps
from pycnoctl.sim.fakedev import MemoryValveBank


class Watch:
    """Counts pressure samples, fires the injected fault once while filling, and notes the first
    moment after it that the simulator's real valves are in the safe state."""

    def __init__(self, truth: Any) -> None:
        self.truth = truth
        self.samples = 0
        self.fired: tuple[int, float] | None = None
        self.safe_at: tuple[int, float] | None = None

    def filling(self) -> bool:
        return bool(self.truth.actual_valves()["inlet"]) and self.truth.gauge_pressure("cell") > 0.3e5

    def maybe_fire(self, where: str) -> None:
        if self.fired is None and self.filling():
            self.fired = (self.samples, time.perf_counter())
            raise RuntimeError(f"injected fault in the {where}")

    def after_command(self) -> None:
        if self.fired is not None and self.safe_at is None:
            v = self.truth.actual_valves()
            if not v["inlet"] and v["vent"]:
                self.safe_at = (self.samples, time.perf_counter())


class WatchedSensor:
    def __init__(self, inner: Any, watch: Watch, inject: bool) -> None:
        self.inner, self.watch, self.inject = inner, watch, inject

    def read(self) -> Any:
        self.watch.samples += 1
        if self.inject:
            self.watch.maybe_fire("pressure read")
        return self.inner.read()

    def __getattr__(self, item: str) -> Any:
        return getattr(self.inner, item)


class WatchedBoard:
    def __init__(self, inner: Any, watch: Watch, inject: bool) -> None:
        self.inner, self.watch, self.inject = inner, watch, inject

    def set_valves(self, states: Mapping[str, bool]) -> None:
        if self.inject and dict(states) == {"inlet": False}:  # the end of the fill
            self.watch.maybe_fire("valve command")
        self.inner.set_valves(states)
        self.watch.after_command()

    def __getattr__(self, item: str) -> Any:
        return getattr(self.inner, item)


@pytest.fixture
def inject(monkeypatch):
    """inject(where) -> the Watch; the next `run --sim` gets the fault at that place."""
    state: dict[str, Any] = {}

    def arm(where: str) -> dict[str, Any]:
        real_build = simulated.build_sim_instrument

        def build(*a: Any, **kw: Any) -> Any:
            inst = real_build(*a, **kw)
            watch = Watch(inst.extras["sim"])
            state["watch"] = watch
            inst.pressure = WatchedSensor(inst.pressure, watch, where == "pressure")
            inst.valves.inner = WatchedBoard(inst.valves.inner, watch, where == "valve")
            return inst

        monkeypatch.setattr(simulated, "build_sim_instrument", build)
        if where == "engine":
            real_step = RunEngine.step

            def step(self: RunEngine, s: Any) -> None:
                state["watch"].maybe_fire("engine step")
                real_step(self, s)

            monkeypatch.setattr(RunEngine, "step", step)
        if where == "recorder":
            real_sample = RunRecorder.sample

            def sample(self: RunRecorder, *a: Any, **kw: Any) -> None:
                state["watch"].maybe_fire("recorder")
                real_sample(self, *a, **kw)

            monkeypatch.setattr(RunRecorder, "sample", sample)
        return state

    return arm


@pytest.mark.parametrize("where", ["pressure", "valve", "engine", "recorder"])
def test_an_exception_anywhere_in_a_fill_reaches_the_safe_state_the_record_and_the_cli(
        tmp_path, capsys, inject, where):
    state = inject(where)
    rc = main(["run", "quick-demo", "--sim", "--quiet", "--data", str(tmp_path)])
    out = capsys.readouterr()
    watch: Watch = state["watch"]
    assert watch.fired is not None, "the fault was never injected"
    # safe state on the simulator's real valves, before another sample was taken
    assert watch.safe_at is not None
    samples = watch.safe_at[0] - watch.fired[0]
    ms = (watch.safe_at[1] - watch.fired[1]) * 1e3
    print(f"\nfault in {where}: safe state after {samples} sample(s), {ms:.2f} ms wall")
    assert samples == 0
    v = watch.truth.actual_valves()
    assert v["inlet"] is False and v["vent"] is True
    # the exception is in the run's events
    with Catalog(tmp_path / "catalog.sqlite") as cat:
        (row,) = cat.list_runs()
    events = [json.loads(line) for line in (tmp_path / "runs" / row.id / "events.jsonl").read_text().splitlines()]
    exc = [e for e in events if e["kind"] == "exception"]
    assert exc and exc[0]["type"] == "RuntimeError" and "injected fault in the" in exc[0]["message"]
    assert exc[0]["where"] and exc[0]["safe_state_ok"] is True
    # the part of the tick named from the traceback (a valve command comes from an engine transition)
    assert exc[0]["where"].startswith({"pressure": "acquire", "valve": "engine step", "engine": "engine step",
                                       "recorder": "record"}[where])
    trips = [e for e in events if e["kind"] == "trip"]
    assert trips and trips[0]["interlock"] == "exception"
    # the catalog row is closed and says what happened
    assert row.status == "fault" and "RuntimeError" in (row.message or "")
    # the CLI: fault exit code, one line on stderr, no traceback
    assert rc == 3
    lines = [ln for ln in out.err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "RuntimeError" in lines[0], out.err
    assert "Traceback" not in out.err + out.out


class SilentBoard(MemoryValveBank):
    """A relay board that has gone quiet: every command waits out the driver's time-out."""

    def __init__(self, timeout: float) -> None:
        super().__init__(("inlet", "vent", "small", "large"), {"inlet": True, "vent": False})
        self.timeout = timeout
        self.tried: list[str] = []

    def set_valves(self, states: Mapping[str, bool]) -> None:
        self.tried.extend(states)
        time.sleep(self.timeout)
        raise DeviceTimeout("relays", "no reply")


def test_a_silent_board_costs_one_deadline_not_one_timeout_per_valve():
    board = SilentBoard(timeout=0.5)  # four valves: 2 s if each waited its own time-out
    steps = [("inlet", False), ("vent", True), ("small", True), ("large", True)]
    t0 = time.perf_counter()
    failures = apply_steps(board, steps, SAFE_STATE_DEADLINE)
    took = time.perf_counter() - t0
    print(f"\nsilent board: safe-state attempt returned after {took * 1e3:.0f} ms "
          f"(deadline {SAFE_STATE_DEADLINE * 1e3:.0f} ms, 4 commands x 500 ms time-out)")
    assert took < SAFE_STATE_DEADLINE + 0.1
    assert [f[0] for f in failures] == ["inlet", "vent", "small", "large"]
    assert board.tried[0] == "inlet"  # inlet first
    time.sleep(1.2)  # the attempt goes on in the background: every valve is still tried
    assert board.tried == ["inlet", "vent", "small", "large"]


def test_silent_relay_board_through_the_real_driver_is_bounded_by_the_deadline():
    """The serial relay driver on a fake board that stops answering (pty, real time-outs)."""
    from test_usb_pull_mid_fill import EXAMPLE, EXAMPLE_VALVES, GAUGE_PORT, RELAY_PORT

    from pycnoctl.drivers.config import build_instrument, load_instrument_config
    from pycnoctl.drivers.relay_ascii import Channel
    from pycnoctl.sim.fakedev import FakeDevice, GaugeFirmware, RelayFirmware

    sim = simulated.build_sim_instrument()
    names = dict(zip(EXAMPLE_VALVES, sim.valves.valve_names, strict=True))
    chans = {names[k]: Channel(i + 1, k == "vent") for i, k in enumerate(EXAMPLE_VALVES)}
    relay = FakeDevice(RelayFirmware.for_board(sim.valves, chans), link="pty")
    gauge = FakeDevice(GaugeFirmware(sim.pressure, unit="kPa"), link="pty")
    cfg = Path(__import__("tempfile").mkdtemp()) / "usb.yaml"
    cfg.write_text(EXAMPLE.read_text().replace(RELAY_PORT, relay.url).replace(GAUGE_PORT, gauge.url))
    inst = build_instrument(load_instrument_config(cfg), clock=sim.clock)
    try:
        assert inst.safe_state() is True
        relay.fault = "silent"
        t0 = time.perf_counter()
        ok = inst.safe_state()
        took = time.perf_counter() - t0
        print(f"\nsilent relay board (serial driver): safe state gave up after {took * 1e3:.0f} ms")
        assert ok is False and "safe state incomplete" in (inst.safe_state_error or "")
        assert took < SAFE_STATE_DEADLINE + 0.25
        relay.fault = None
        time.sleep(3.0)  # let the background attempt finish on the board that answers again
        assert inst.safe_state() is True
    finally:
        relay.fault = None
        inst.close()
        relay.close()
        gauge.close()


class Stubborn(MemoryValveBank):
    """One valve whose command raises something no driver would (a bug, not a DeviceError)."""

    def __init__(self, bad: str) -> None:
        super().__init__(("inlet", "vent", "small", "large"), {"inlet": True, "vent": False})
        self.bad = bad

    def set_valves(self, states: Mapping[str, bool]) -> None:
        if self.bad in states:
            raise RuntimeError(f"{self.bad}: driver bug")
        super().set_valves(states)


@pytest.mark.parametrize("bad", ["inlet", "small"])
def test_every_valve_is_tried_whatever_one_raises(bad):
    board = Stubborn(bad)
    failures = apply_steps(board, [("inlet", False), ("vent", True), ("small", True), ("large", True)], 1.0)
    assert [f[0] for f in failures] == [bad] and "RuntimeError" in failures[0][2]
    state = board.commanded()
    assert state["vent"] is True and state["large"] is True
    assert state["inlet"] is (bad == "inlet")  # only the broken one is left as it was


def test_an_exception_on_every_idle_tick_latches_once_and_keeps_the_valves_safe():
    from pycnoctl.controller.run.control import Controller

    inst = simulated.build_sim_instrument()
    truth = inst.extras["sim"]
    events: list[tuple[str, dict[str, Any]]] = []
    controller = Controller(inst)
    controller.listeners.append(lambda kind, data: events.append((kind, data)))
    inst.valves.set_valves({"vent": False})
    inst.valves.set_valves({"inlet": True})  # someone left it filling
    broken = WatchedSensor(inst.pressure, Watch(truth), inject=False)
    broken.read = lambda: (_ for _ in ()).throw(ValueError("sensor driver bug"))  # type: ignore[method-assign]
    inst.pressure = broken
    for _ in range(20):
        s = controller.tick()
        assert not s.pressure.valid
    assert truth.actual_valves()["inlet"] is False and truth.actual_valves()["vent"] is True
    assert controller.monitor.latched is not None and controller.monitor.latched.kind == "exception"
    assert [k for k, _ in events if k == "exception"] == ["exception"]
    assert controller.repeated_failures == 19


def test_a_failure_while_storing_the_run_closes_the_row_as_a_fault_and_the_cli_says_so_in_one_line(
        tmp_path, capsys, monkeypatch):
    def broken(self: Catalog, *a: Any, **kw: Any) -> None:
        raise RuntimeError("catalog bug")

    monkeypatch.setattr(Catalog, "add_cycles", broken)
    rc = main(["run", "quick-demo", "--sim", "--quiet", "--data", str(tmp_path)])
    out = capsys.readouterr()
    assert rc == 3
    lines = [ln for ln in out.err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "RuntimeError while storing the run: catalog bug" in lines[0], out.err
    assert "Traceback" not in out.err + out.out
    with Catalog(tmp_path / "catalog.sqlite") as cat:
        (row,) = cat.list_runs()
    assert row.status == "fault" and "catalog bug" in (row.message or "")
    events = [json.loads(x) for x in (tmp_path / "runs" / row.id / "events.jsonl").read_text().splitlines()]
    assert any(e["kind"] == "exception" and e["where"] == "bookkeeping" for e in events)


def test_an_exception_from_the_run_loop_itself_takes_the_same_path(tmp_path):
    from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
    from pycnoctl.controller.run.control import Controller

    inst = simulated.build_sim_instrument()
    truth = inst.extras["sim"]
    calls = {"n": 0}

    def should_stop() -> bool:
        calls["n"] += 1
        if truth.actual_valves()["inlet"] and truth.gauge_pressure("cell") > 0.3e5:
            raise KeyError("stop check bug")
        return False

    with Catalog(tmp_path / "catalog.sqlite") as cat:
        prepared = prepare(RunRequest("quick-demo"), inst, cat)
        summary = execute(prepared, Controller(inst), root=tmp_path / "runs", catalog=cat, should_stop=should_stop)
        row = cat.get_run(summary["run_id"])
    v = truth.actual_valves()
    assert v["inlet"] is False and v["vent"] is True
    assert summary["status"] == "fault" and summary["fault"]["kind"] == "exception"
    assert row is not None and row.status == "fault" and "KeyError in run loop" in (row.message or "")
    events = [json.loads(x) for x in (tmp_path / "runs" / row.id / "events.jsonl").read_text().splitlines()]
    assert any(e["kind"] == "exception" and e["where"] == "run loop" for e in events)
    inst.close()
