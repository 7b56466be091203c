"""Late replies: a device that answers after the driver's timeout must never make the next exchange
read that old answer as its own (the late-reply rule of drivers/transports.py), exchange by exchange
against fake firmware on a pty."""

from __future__ import annotations

import time

import pytest

from pycnoctl.controller.domain.clock import ManualClock
from pycnoctl.controller.domain.devices import DeviceTimeout, ProtocolError, Validity
from pycnoctl.drivers.gauge_ascii import AsciiGauge, GaugeFormat
from pycnoctl.drivers.relay_ascii import AsciiRelayBoard, Channel
from pycnoctl.drivers.transports import SerialTransport
from pycnoctl.sim.fakedev import FakeDevice, GaugeFirmware, MemoryValveBank, RelayFirmware, ScriptedSensor

TIMEOUT = 0.2


@pytest.fixture
def gauge_dev():
    sensor = ScriptedSensor(100e3)
    with FakeDevice(GaugeFirmware(sensor)) as dev:
        link = SerialTransport(dev.url, timeout=TIMEOUT)
        yield sensor, dev, AsciiGauge(link, fmt=GaugeFormat(), clock=ManualClock())
        link.close()


def test_late_gauge_reply_is_not_the_next_reading(gauge_dev):
    sensor, dev, gauge = gauge_dev
    # exchange 1: the gauge reads 100 kPa but answers 0.3 s late, after the 0.2 s timeout
    dev.reply_delay = 1.5 * TIMEOUT
    r1 = gauge.read()
    assert r1.validity is Validity.TIMEOUT
    # exchange 2: the gauge is prompt again and now reads 200 kPa; its late '100 kPa' is still on the way
    dev.reply_delay = 0.0
    sensor.value = 200e3
    r2 = gauge.read()
    assert r2.valid and r2.value == pytest.approx(200e3)  # not the 100 kPa of exchange 1
    # the device saw two queries and answered both; the driver used only the second answer
    assert [reply for _, reply in dev.exchanges] == [b"P 100.0000 kPa\n", b"P 200.0000 kPa\n"]
    # exchange 3: nothing is owed any more, nothing is dropped
    sensor.value = 150e3
    assert gauge.read().value == pytest.approx(150e3)


def test_always_late_gauge_never_gives_a_valid_reading(gauge_dev):
    # every answer comes after the timeout: each one belongs to a query already given up
    sensor, dev, gauge = gauge_dev
    dev.reply_delay = 1.5 * TIMEOUT
    got = []
    for k in range(4):
        sensor.value = (k + 1) * 10e3
        got.append(gauge.read().validity)
    assert got == [Validity.TIMEOUT] * 4


def test_late_reply_already_waiting_is_flushed(gauge_dev):
    sensor, dev, gauge = gauge_dev
    dev.reply_delay = 1.5 * TIMEOUT
    assert gauge.read().validity is Validity.TIMEOUT
    dev.reply_delay = 0.0
    time.sleep(3 * TIMEOUT)  # the late line has arrived and waits in the input buffer
    sensor.value = 250e3
    assert gauge.read().value == pytest.approx(250e3)


def test_late_relay_ack_is_not_taken_for_the_next_command():
    # relay 9 does not exist on an 8-relay board, so the board refuses it with 'ERR 3 ...';
    # a late 'OK' from the command before must not be read as its acknowledgement
    bank = MemoryValveBank(("inlet",))
    fw = RelayFirmware(bank, {1: ("inlet", False)}, n_relays=8)
    with FakeDevice(fw) as dev:
        link = SerialTransport(dev.url, timeout=TIMEOUT)
        board = AsciiRelayBoard(link, {"inlet": Channel(1), "ghost": Channel(9)})
        dev.reply_delay = 1.5 * TIMEOUT
        with pytest.raises(DeviceTimeout):
            board.set_valves({"inlet": True})
        dev.reply_delay = 0.0
        with pytest.raises(ProtocolError, match="refused"):
            board.set_valves({"ghost": True})
        assert [reply for _, reply in dev.exchanges][-1].startswith(b"ERR 3")
        link.close()


def test_silent_device_costs_one_extra_window_only_after_a_timeout(gauge_dev):
    _sensor, dev, gauge = gauge_dev
    dev.fault = "silent"
    t0 = time.monotonic()
    assert gauge.read().validity is Validity.TIMEOUT
    assert gauge.read().validity is Validity.TIMEOUT  # waits out the owed window, then its own timeout
    elapsed = time.monotonic() - t0
    assert 3 * TIMEOUT - 0.05 <= elapsed < 3 * TIMEOUT + 0.5
    dev.fault = None
    time.sleep(TIMEOUT)  # the owed window has passed: the next read does not wait for it
    t1 = time.monotonic()
    assert gauge.read().valid
    assert time.monotonic() - t1 < TIMEOUT
