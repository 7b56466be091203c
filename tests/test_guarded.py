"""Valve guard: forbidden combinations refused before any I/O, close-before-open, read-back, safe state."""

from __future__ import annotations

import pytest

from pycnoctl.controller.domain.devices import DeviceError, ForbiddenValveState
from pycnoctl.controller.domain.gaspath import ValveRoles
from pycnoctl.drivers.guarded import GuardedValveBank, safe_state
from pycnoctl.drivers.relay_ascii import AsciiRelayBoard, Channel
from pycnoctl.drivers.transports import SerialTransport
from pycnoctl.sim.fakedev import FakeDevice, MemoryValveBank, RelayFirmware, ScriptedTransport

ROLES = ValveRoles(inlet="inlet", vent="vent", expansion={"small": "small"})
CHANNELS = {"inlet": Channel(1), "vent": Channel(2, normally_open=True), "small": Channel(3)}


def test_forbidden_combination_sends_zero_bytes():
    t = ScriptedTransport([])  # any byte sent fails the test
    guard = GuardedValveBank(AsciiRelayBoard(t, CHANNELS), roles=ROLES)
    with pytest.raises(ForbiddenValveState, match="inlet"):
        guard.set_valves({"inlet": True})  # the vent is open at power-up (NO)
    with pytest.raises(ForbiddenValveState):
        guard.set_valves({"inlet": True, "vent": True})
    with pytest.raises(ForbiddenValveState, match="unknown"):
        guard.set_valves({"outlet": True})
    assert t.sent == []


def test_closes_go_before_opens():
    # from vent open to inlet open: the vent must close first or both are open for a moment
    t = ScriptedTransport([
        (b"RELAY 2 ON\n", b"OK\n"),  # vent closed (NO valve energised)
        (b"RELAY 1 ON\n", b"OK\n"),  # then inlet open
        (b"STATE?\n", b"STATE 0003\n"),
    ])
    guard = GuardedValveBank(AsciiRelayBoard(t, CHANNELS), roles=ROLES)
    guard.set_valves({"inlet": True, "vent": False})
    assert t.done()


def test_partial_command_merges_with_commanded_state():
    bank = MemoryValveBank(("inlet", "vent", "small"), {"vent": False, "inlet": True})
    guard = GuardedValveBank(bank, [["inlet", "vent"], ["small", "vent"]])
    guard.set_valves({"small": True})
    assert bank.commanded() == {"inlet": True, "vent": False, "small": True}
    with pytest.raises(ForbiddenValveState, match="small"):
        guard.set_valves({"inlet": False, "vent": True})  # small is still open


def test_read_back_mismatch_is_device_error():
    bank = MemoryValveBank(("inlet", "vent", "small"), {"vent": True})
    bank.stuck["small"] = False
    guard = GuardedValveBank(bank, roles=ROLES)
    with pytest.raises(DeviceError, match="small: commanded open, reads closed"):
        guard.set_valves({"small": True})


def test_bad_forbidden_lists():
    bank = MemoryValveBank(("inlet", "vent"))
    with pytest.raises(ValueError, match="unknown"):
        GuardedValveBank(bank, [["inlet", "exhaust"]])
    with pytest.raises(ValueError, match="two or more"):
        GuardedValveBank(bank, [["inlet"]])


def test_safe_state_is_idempotent_and_ordered():
    bank = MemoryValveBank(("inlet", "vent", "small"), {"inlet": True})
    guard = GuardedValveBank(bank, roles=ROLES)
    assert safe_state(guard, ROLES) == {"inlet": False, "vent": True, "small": True}
    assert bank.history[0] == {"inlet": False}  # inlet closed before anything opens
    assert safe_state(guard, ROLES) == {"inlet": False, "vent": True, "small": True}


def test_safe_state_keeps_going_after_a_busy_reply():
    # the inlet command times out, yet the vent and the expansion valve are still tried
    t = ScriptedTransport([
        (b"RELAY 1 OFF\n", None),
        (b"RELAY 2 OFF\n", b"OK\n"),
        (b"RELAY 3 ON\n", b"OK\n"),
    ])
    guard = GuardedValveBank(AsciiRelayBoard(t, CHANNELS), roles=ROLES, verify=False)
    with pytest.raises(DeviceError, match="safe state incomplete"):
        guard.set_valves(ROLES.safe_state())
    assert t.done()


def test_unplugged_board_fails_safe_state_fast_and_reconnects():
    bank = MemoryValveBank(("inlet", "vent", "small"), {"vent": True})
    with FakeDevice(RelayFirmware.for_board(bank, CHANNELS)) as dev:
        board = AsciiRelayBoard(SerialTransport(dev.url, timeout=0.3), CHANNELS)
        guard = GuardedValveBank(board, roles=ROLES)
        guard.set_valves({"vent": False})
        guard.set_valves({"inlet": True})  # filling
        dev.unplug()  # USB cable pulled mid-fill
        with pytest.raises(DeviceError):
            guard.set_valves(ROLES.safe_state())
        dev.replug()
        guard.reconnect()
        assert safe_state(guard, ROLES) == {"inlet": False, "vent": True, "small": True}
        assert bank.commanded() == {"inlet": False, "vent": True, "small": True}
        guard.close()

