"""Fake byte-level devices backed by the simulator: the real serial drivers drive simulated gas."""

from __future__ import annotations

import time

import pytest

from pycnoctl.controller.domain.devices import Validity
from pycnoctl.drivers.gauge_ascii import AsciiGauge, GaugeFormat
from pycnoctl.drivers.relay_ascii import AsciiRelayBoard, Channel
from pycnoctl.drivers.transports import SerialTransport
from pycnoctl.sim.fakedev import (
    GARBAGE,
    FakeDevice,
    GaugeFirmware,
    MemoryValveBank,
    RelayFirmware,
    ScriptedSensor,
    ScriptedTransport,
)

simulated = pytest.importorskip("pycnoctl.drivers.simulated")


@pytest.fixture
def sim():
    inst = simulated.build_sim_instrument()
    yield inst
    inst.close()


def channels_for(names):
    # NC everywhere except the vent (NO), as the safety notes ask
    return {n: Channel(i + 1, normally_open=(n == "vent")) for i, n in enumerate(names)}


@pytest.mark.parametrize("link", ["pty", "tcp"])
def test_inlet_relay_through_serial_raises_simulated_gauge_pressure(sim, link):
    names = sim.valves.valve_names
    chans = channels_for(names)
    with FakeDevice(RelayFirmware.for_board(sim.valves, chans), link=link) as relay_dev, \
            FakeDevice(GaugeFirmware(sim.pressure, unit="kPa"), link=link) as gauge_dev:
        board = AsciiRelayBoard(SerialTransport(relay_dev.url, timeout=0.5), chans)
        gauge = AsciiGauge(SerialTransport(gauge_dev.url, timeout=0.5), fmt=GaugeFormat(unit="kPa"),
                           clock=sim.clock)
        board.set_valves(sim.roles.safe_state())
        sim.clock.sleep(2.0)
        vented = gauge.read()
        assert vented.valid
        closes = {v: False for v in names if v != sim.roles.inlet}
        board.set_valves(closes)
        board.set_valves({sim.roles.inlet: True})
        assert sim.valves.commanded()[sim.roles.inlet] is True  # the relay really moved the sim valve
        sim.clock.sleep(1.0)
        filled = gauge.read()
        assert filled.valid and filled.value > vented.value + 10e3  # at least 10 kPa of fill
        assert board.read_back() == sim.valves.read_back()
        board.set_valves({sim.roles.inlet: False})
        board.set_valves({sim.roles.vent: True})
        sim.clock.sleep(5.0)
        assert gauge.read().value < filled.value
        board.close()
        gauge.close()


def test_firmware_dialogue_and_errors():
    bank = MemoryValveBank(("inlet", "vent"))
    fw = RelayFirmware(bank, {1: ("inlet", False), 2: ("vent", True)}, n_relays=4)
    assert fw.handle(b"RELAY 1 ON\n") == b"OK\n" and bank.commanded()["inlet"] is True
    assert fw.handle(b"RELAY 2 ON\n") == b"OK\n" and bank.commanded()["vent"] is False
    assert fw.handle(b"STATE?\n") == b"STATE 0003\n"
    assert fw.handle(b"RELAY 9 ON\n").startswith(b"ERR 3")
    assert fw.handle(b"RELAY 1 MAYBE\n").startswith(b"ERR 2")
    assert fw.handle(b"FLY\n").startswith(b"ERR 1")
    assert fw.handle(b"RELAY 1 ON" + b" " * 60 + b"\n").startswith(b"ERR 1")  # over 64 characters
    assert fw.handle(b"ALLOFF\n") == b"OK\n"
    assert bank.commanded() == {"inlet": False, "vent": True}
    assert fw.handle(b"STATE?\n") == b"STATE 0000\n"


def test_watchdog_de_energises_on_silence():
    # heartbeat rule of PROTOCOL.md; time is injected, so no sleeping
    now = [0.0]
    bank = MemoryValveBank(("inlet", "vent"))
    fw = RelayFirmware(bank, {1: ("inlet", False), 2: ("vent", True)}, monotonic=lambda: now[0])
    fw.handle(b"WDOG 2\n")
    fw.handle(b"RELAY 2 ON\n")
    fw.handle(b"RELAY 1 ON\n")
    now[0] = 1.5
    fw.tick()
    assert bank.commanded() == {"inlet": True, "vent": False}
    now[0] = 3.6
    fw.tick()
    assert bank.commanded() == {"inlet": False, "vent": True}  # power-loss state: vented
    assert fw.watchdog_tripped


def test_gauge_firmware_follows_validity():
    s = ScriptedSensor(123456.0)
    fw = GaugeFirmware(s, unit="kPa")
    assert fw.handle(b"P?\n") == b"P 123.4560 kPa\n"
    s.script = [Validity.NAN, Validity.OUT_OF_RANGE, Validity.GARBLED, Validity.TIMEOUT]
    assert [fw.handle(b"P?\n") for _ in range(4)] == [b"P NaN kPa\n", b"P OVER kPa\n", GARBAGE, None]


def test_scripted_transport_flags_wrong_bytes():
    t = ScriptedTransport([(b"RELAY 1 ON\n", b"OK\n")])
    with pytest.raises(AssertionError, match="expected"):
        t.query(b"RELAY 1 OFF\n")


def test_shutdown_is_bounded():
    t0 = time.monotonic()
    for link in ("pty", "tcp"):
        dev = FakeDevice(GaugeFirmware(ScriptedSensor()), link=link)
        dev.close()
    assert time.monotonic() - t0 < 2.0
