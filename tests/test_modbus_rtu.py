"""The Modbus gauge over RTU: pymodbus's serial client on a pty pair against a small responder that
speaks the Modbus-over-serial-line framing (address, function, data, CRC-16/MODBUS)."""

from __future__ import annotations

import contextlib
import os
import struct
import threading
import time
import tty

import pytest
import scipy.constants as sc

from pycnoctl.controller.domain.clock import ManualClock
from pycnoctl.controller.domain.devices import Validity
from pycnoctl.drivers.modbus_gauge import ModbusGauge, RegisterMap


def crc16_modbus(data: bytes) -> int:
    """CRC-16/MODBUS: reflected polynomial 0xA001, initial value 0xFFFF (Modbus serial line spec)."""
    crc = 0xFFFF
    for b in data:
        crc ^= b
        for _ in range(8):
            crc = (crc >> 1) ^ 0xA001 if crc & 1 else crc >> 1
    return crc


def test_crc_check_value():
    # the catalogue check value of CRC-16/MODBUS over b"123456789" is 0x4B37 [from memory]
    assert crc16_modbus(b"123456789") == 0x4B37


class RtuResponder:
    """Answers function 03/04 reads from `registers` on the master side of a pty."""

    def __init__(self, unit: int = 1) -> None:
        self.unit = unit
        self.registers: dict[int, int] = {}
        self.silent = False
        self.delay = 0.0  # s before each reply (a late device)
        self.master, slave = os.openpty()
        tty.setraw(slave)
        self.port = os.ttyname(slave)
        self._slave = slave
        self._stop = False
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        buf = b""
        while not self._stop:
            try:
                buf += os.read(self.master, 256)
            except OSError:
                return
            while len(buf) >= 8:
                frame, buf = buf[:8], buf[8:]
                unit, fc, addr, count = struct.unpack(">BBHH", frame[:6])
                if crc16_modbus(frame[:6]) != struct.unpack("<H", frame[6:])[0] or unit != self.unit:
                    continue  # a corrupt or foreign frame gets no reply, as on a real bus
                if self.silent:
                    continue
                if fc in (3, 4):
                    words = [self.registers.get(addr + i, 0) for i in range(count)]
                    body = struct.pack(">BBB", unit, fc, 2 * count) + struct.pack(f">{count}H", *words)
                else:
                    body = struct.pack(">BBB", unit, fc | 0x80, 1)  # illegal function
                if self.delay:
                    time.sleep(self.delay)
                os.write(self.master, body + struct.pack("<H", crc16_modbus(body)))

    def close(self) -> None:
        self._stop = True
        for fd in (self.master, self._slave):
            with contextlib.suppress(OSError):
                os.close(fd)


@pytest.fixture
def responder():
    r = RtuResponder()
    yield r
    r.close()


def test_float32_over_rtu(responder):
    hi, lo = struct.unpack(">HH", struct.pack(">f", 1.25))  # IEEE 754 via the stdlib
    responder.registers = {100: hi, 101: lo}
    g = ModbusGauge.rtu(responder.port, RegisterMap(address=100, datatype="float32", unit="bar"), baudrate=115200,
                        timeout=0.3, clock=ManualClock(2.0))
    try:
        r = g.read()
        assert r.valid and r.value == pytest.approx(1.25 * sc.bar) and r.t == 2.0
        responder.registers = {100: 0, 101: 0}
        assert g.read().value == 0.0
    finally:
        g.close()


def test_silent_rtu_device_is_a_timeout_not_a_number(responder):
    responder.silent = True
    g = ModbusGauge.rtu(responder.port, RegisterMap(address=0, datatype="int16"), baudrate=115200, timeout=0.2,
                        clock=ManualClock(0.0))
    try:
        r = g.read()
        assert not r.valid and r.validity in (Validity.TIMEOUT, Validity.DISCONNECTED)
    finally:
        g.close()


def test_late_rtu_reply_is_not_the_next_reading(responder):
    # RTU frames carry no transaction id: a reply after the timeout must not answer the next request
    responder.registers = {0: 100}
    g = ModbusGauge.rtu(responder.port, RegisterMap(address=0, datatype="int16", unit="kPa"), baudrate=115200,
                        timeout=0.2, clock=ManualClock(0.0))
    try:
        responder.delay = 0.3
        assert g.read().validity is Validity.TIMEOUT  # the device will still answer '100' at 0.3 s
        responder.delay = 0.0
        responder.registers = {0: 200}
        r = g.read()
        assert r.valid and r.value == pytest.approx(200e3)  # not the late 100 kPa
        responder.registers = {0: 150}
        assert g.read().value == pytest.approx(150e3)
    finally:
        g.close()
