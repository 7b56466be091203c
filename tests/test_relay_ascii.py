"""Template relay board: exchange-by-exchange protocol, binary frames, NO/NC mapping, errors."""

from __future__ import annotations

import time

import pytest

from pycnoctl.controller.domain.devices import DeviceDisconnected, DeviceTimeout, ProtocolError
from pycnoctl.drivers.relay_ascii import AsciiRelayBoard, Channel, FrameTemplate, RelayCommands, unescape
from pycnoctl.drivers.transports import SerialTransport
from pycnoctl.sim.fakedev import (
    BinaryRelayFirmware,
    FakeDevice,
    MemoryValveBank,
    RelayFirmware,
    ScriptedTransport,
)

CHANNELS = {"inlet": Channel(1), "vent": Channel(2, normally_open=True), "small": Channel(3)}
BINARY = RelayCommands(set=r"\xA0{channel:byte}{state:byte}{checksum:byte}", energise=1, de_energise=0,
                       ack=None, readback=None, all_off=None, ping=None)


def test_dialogue_open_inlet_close_vent_and_read_back():
    # Protocol of drivers/PROTOCOL.md; NC inlet energises to open, NO vent energises to close.
    t = ScriptedTransport([
        (b"RELAY 1 ON\n", b"OK\n"),
        (b"RELAY 2 ON\n", b"OK\n"),
        (b"STATE?\n", b"STATE 0003\n"),
        (b"RELAY 2 OFF\n", b"OK\n"),
    ])
    board = AsciiRelayBoard(t, CHANNELS)
    assert board.commanded() == {"inlet": False, "vent": True, "small": False}  # power-up = de-energised
    board.set_valves({"inlet": True, "vent": False})
    assert board.read_back() == {"inlet": True, "vent": False, "small": False}
    board.set_valves({"vent": True})
    assert board.commanded() == {"inlet": True, "vent": True, "small": False}
    assert t.done()


def test_error_reply_is_protocol_error_with_context():
    t = ScriptedTransport([(b"RELAY 3 ON\n", b"ERR 3 relay 3 out of range 1..2\n")])
    board = AsciiRelayBoard(t, CHANNELS)
    with pytest.raises(ProtocolError) as info:
        board.set_valves({"small": True})
    assert info.value.command == b"RELAY 3 ON\n" and b"ERR 3" in info.value.reply
    assert board.commanded()["small"] is False  # not acknowledged, not recorded


def test_silent_board_is_timeout():
    board = AsciiRelayBoard(ScriptedTransport([(b"RELAY 1 ON\n", None)]), CHANNELS)
    with pytest.raises(DeviceTimeout):
        board.set_valves({"inlet": True})


def test_binary_frame_checksum_matches_common_module_frames():
    # The 4-byte frames of common serial USB relay modules (A0 01 01 A2 = relay 1 on), checksum
    # = low byte of the sum of the first three bytes (vendor frame convention, from memory).
    tpl = FrameTemplate.parse(BINARY.set)
    assert tpl.render(channel=1, state=1) == bytes.fromhex("A00101A2")
    assert tpl.render(channel=1, state=0) == bytes.fromhex("A00100A1")
    assert tpl.render(channel=2, state=1) == bytes.fromhex("A00201A3")


def test_yaml_decoded_high_chars_mean_bytes():
    # YAML "\xA0" arrives as U+00A0; it must mean the byte 0xA0, as the escaped form does.
    assert FrameTemplate.parse("\u00a0{channel:byte}").render(channel=5) == b"\xa0\x05"
    assert unescape(r"a\tb\\c\x41") == "a\tb\\cA"


def test_template_errors():
    with pytest.raises(ValueError, match="unknown field"):
        FrameTemplate.parse("RELAY {chan}")
    with pytest.raises(ValueError, match=r"0\.\.255"):
        FrameTemplate.parse("{channel:byte}").render(channel=300)
    with pytest.raises(ValueError, match="not one byte"):
        FrameTemplate.parse("RELAY \u2603")
    with pytest.raises(ValueError, match="share relay"):
        AsciiRelayBoard(ScriptedTransport([]), {"a": Channel(1), "b": Channel(1)})


def test_binary_frames_over_pyserial_loop():
    # loop:// hands back exactly the bytes written: the frames reach the wire unchanged.
    t = SerialTransport("loop://", timeout=0.2)
    board = AsciiRelayBoard(t, CHANNELS, commands=BINARY)
    board.set_valves({"vent": False})  # NO vent closed = relay 2 energised
    assert t.read_exact(4) == bytes.fromhex("A00201A3")
    assert board.read_back() is None
    t.close()


@pytest.mark.parametrize("link", ["pty", "tcp"])
def test_text_board_through_fake_firmware(link):
    bank = MemoryValveBank(("inlet", "vent", "small"), {"vent": True})
    fw = RelayFirmware.for_board(bank, CHANNELS)
    with FakeDevice(fw, link=link) as dev:
        board = AsciiRelayBoard(SerialTransport(dev.url, timeout=0.5), CHANNELS)
        board.set_valves({"vent": False, "small": True})
        assert bank.commanded() == {"inlet": False, "vent": False, "small": True}
        assert board.read_back() == bank.commanded()
        bank.stuck["small"] = False  # a valve that did not move shows in the read-back
        assert board.read_back()["small"] is False
        assert board.ping() is True
        board.de_energise_all()
        assert bank.commanded() == {"inlet": False, "vent": True, "small": False}
        assert dev.received[-1] == b"ALLOFF\n"
        board.close()


def test_binary_board_through_fake_firmware():
    bank = MemoryValveBank(("inlet", "vent", "small"), {"vent": True})
    fw = BinaryRelayFirmware.for_board(bank, CHANNELS)
    with FakeDevice(fw) as dev:
        board = AsciiRelayBoard(SerialTransport(dev.url, timeout=0.5), CHANNELS, commands=BINARY)
        board.set_valves({"small": True})
        # no reply: wait (bounded) until the fake has taken the frame
        deadline = time.monotonic() + 2.0
        while not bank.history and time.monotonic() < deadline:
            time.sleep(0.005)
        assert bank.commanded()["small"] is True
        board.close()


def test_unplug_mid_command_is_disconnect_then_reconnect_by_stable_path():
    bank = MemoryValveBank(("inlet", "vent", "small"), {"vent": True})
    with FakeDevice(RelayFirmware.for_board(bank, CHANNELS)) as dev:
        board = AsciiRelayBoard(SerialTransport(dev.url, timeout=0.5), CHANNELS)
        dev.fault = "drop"  # the cable comes out while the board is answering
        with pytest.raises(DeviceDisconnected):
            board.set_valves({"inlet": True})
        with pytest.raises(DeviceDisconnected):  # the dead port is not used again
            board.set_valves({"inlet": False})
        dev.fault = None
        dev.replug()
        # a new pty (the kernel may reuse the tty number); the stable symlink points at it
        board.reconnect()
        board.set_valves({"small": True})
        assert bank.commanded()["small"] is True
        board.close()
