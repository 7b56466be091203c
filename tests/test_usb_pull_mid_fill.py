"""A USB cable pulled mid-fill, end to end: the real serial drivers, fake devices on pty pairs
backed by the simulator, the controller and the engine.

Safety rules (shared design notes): on a communication failure the safe state is asserted as far as
the hardware still answers, the fault latches, the device is reopened by its stable path only on an
operator reset, and a run is never resumed.
"""

from __future__ import annotations

import tempfile
from importlib.resources import files
from pathlib import Path

import pytest

from pycnoctl.controller.jobs.measurement import RunRequest, prepare
from pycnoctl.controller.run.control import Controller
from pycnoctl.controller.run.engine import RunEngine
from pycnoctl.drivers.config import build_instrument, load_instrument_config
from pycnoctl.drivers.relay_ascii import Channel
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.fakedev import FakeDevice, GaugeFirmware, RelayFirmware

EXAMPLE = Path(str(files("pycnoctl.drivers") / "instruments" / "usb-relay-serial-gauge.yaml"))
RELAY_PORT = "/dev/serial/by-id/usb-relay8-ascii-if00"
GAUGE_PORT = "/dev/serial/by-id/usb-gauge-ascii-if00"
EXAMPLE_VALVES = ["inlet", "vent", "small", "large"]


@pytest.fixture
def bench():
    sim = build_sim_instrument()
    names = dict(zip(EXAMPLE_VALVES, sim.valves.valve_names, strict=True))
    chans = {names[k]: Channel(i + 1, k == "vent") for i, k in enumerate(EXAMPLE_VALVES)}
    relay = FakeDevice(RelayFirmware.for_board(sim.valves, chans), link="pty")
    gauge = FakeDevice(GaugeFirmware(sim.pressure, unit="kPa"), link="pty")
    cfg = Path(tempfile.mkdtemp()) / "usb.yaml"
    cfg.write_text(EXAMPLE.read_text().replace(RELAY_PORT, relay.url).replace(GAUGE_PORT, gauge.url))
    inst = build_instrument(load_instrument_config(cfg), clock=sim.clock)
    yield sim, inst, relay, gauge
    inst.close()
    relay.close()
    gauge.close()


def run_until(controller: Controller, engine: RunEngine, stop) -> None:
    clock = controller.instrument.clock
    while not engine.terminal and not stop():
        controller.tick()
        clock.sleep(controller.instrument.sample_period)


@pytest.mark.parametrize("cable", ["gauge", "relay board"])
def test_cable_pulled_mid_fill_fails_safe_latches_and_recovers_only_on_reset(bench, cable):
    sim, inst, relay, gauge = bench
    truth = sim.extras["sim"]
    controller = Controller(inst)
    prepared = prepare(RunRequest("quick-demo"), inst)
    engine = RunEngine(prepared.sequence, inst, expansion_volume=prepared.expansion_volume)
    controller.start(engine)
    run_until(controller, engine, lambda: engine.state == "fill" and engine.cycle_number == 1)
    run_until(controller, engine, lambda: truth.gauge_pressure("cell") > 0.3e5)  # well into the fill
    assert engine.state == "fill" and truth.actual_valves()["inlet"] is True

    (gauge if cable == "gauge" else relay).unplug()
    t_pull = inst.clock.now()
    run_until(controller, engine, lambda: False)  # until the engine stops
    trip = controller.monitor.latched
    assert engine.state == "fault" and trip is not None
    assert trip.t - t_pull <= 1.5  # within the read-back interval / the next sample
    if cable == "gauge":
        # the board still answers: the safe state was reached at the valves
        assert trip.kind == "invalid_pressurised"
        assert truth.actual_valves()["inlet"] is False and truth.actual_valves()["vent"] is True
    else:
        # with the board gone nothing can be switched; the record says the safe state was not confirmed
        assert trip.kind == "device_error" and trip.safe_state_ok is False

    for _ in range(20):  # the loop keeps watching; still latched, nothing restarts
        controller.tick()
        inst.clock.sleep(inst.sample_period)
    assert controller.monitor.latched is trip and controller.engine is engine and engine.state == "fault"
    assert controller.reset() is False  # cable still out: refused

    (gauge if cable == "gauge" else relay).replug()
    if cable == "relay board":
        # this board kept its relays while unplugged (no firmware watchdog armed), so the inlet
        # stayed open and the cell sits at the regulator's pressure: the first reset reopens the
        # board by its stable path and asserts the safe state, but is refused until it has vented
        assert truth.actual_valves()["inlet"] is True
        assert controller.reset() is False
        assert truth.actual_valves()["inlet"] is False and truth.actual_valves()["vent"] is True
    inst.clock.sleep(30.0)
    assert controller.reset() is True  # reopened by the stable path, condition gone
    assert controller.monitor.latched is None
    assert truth.actual_valves()["inlet"] is False and truth.actual_valves()["vent"] is True
    assert engine.state == "fault"  # the run stays ended; a reset never resumes it
    assert controller.tick().pressure.valid


def test_armed_board_watchdog_vents_by_itself_when_the_cable_is_pulled(tmp_path):
    # PROTOCOL.md watchdog: a board armed with WDOG de-energises every relay when it hears nothing
    # for that long; with the fail-safe build (NC inlet, NO vent) that closes the inlet and vents
    import time

    sim = build_sim_instrument()
    names = dict(zip(EXAMPLE_VALVES, sim.valves.valve_names, strict=True))
    chans = {names[k]: Channel(i + 1, k == "vent") for i, k in enumerate(EXAMPLE_VALVES)}
    firmware = RelayFirmware.for_board(sim.valves, chans)
    relay = FakeDevice(firmware, link="pty")
    gauge = FakeDevice(GaugeFirmware(sim.pressure, unit="kPa"), link="pty")
    text = EXAMPLE.read_text().replace(RELAY_PORT, relay.url).replace(GAUGE_PORT, gauge.url)
    text = text.replace("  valves:\n    inlet:", "  watchdog: 0.5 s\n  valves:\n    inlet:", 1)
    cfg = tmp_path / "usb-wdog.yaml"
    cfg.write_text(text)
    inst = build_instrument(load_instrument_config(cfg), clock=sim.clock)
    try:
        assert firmware.watchdog == pytest.approx(0.5)  # armed when the board was opened
        truth = sim.extras["sim"]
        inst.valves.set_valves({"vent": False, "small": False, "large": False})
        inst.valves.set_valves({"inlet": True})  # filling
        assert truth.actual_valves()["inlet"] is True
        relay.unplug()  # nothing reaches the board any more
        time.sleep(1.0)  # the board's own clock runs out
        assert firmware.watchdog_tripped
        assert truth.actual_valves()["inlet"] is False and truth.actual_valves()["vent"] is True
    finally:
        inst.close()
        relay.close()
        gauge.close()
