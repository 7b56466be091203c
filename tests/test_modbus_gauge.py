"""Modbus register transducer against a pymodbus ModbusTcpServer on 127.0.0.1, backed by a sensor."""

from __future__ import annotations

import asyncio
import math
import struct
import threading

import pytest
import scipy.constants as sc
from pymodbus.server import ModbusTcpServer
from pymodbus.simulator import DataType, SimData, SimDevice

from pycnoctl.controller.domain.clock import ManualClock
from pycnoctl.controller.domain.devices import DeviceDisconnected, Validity
from pycnoctl.drivers.claims import modbus_tcp_key
from pycnoctl.drivers.modbus_gauge import ModbusGauge, RegisterMap, decode
from tests.claim_holder import held_elsewhere


class RegisterServer:
    """A pymodbus TCP server in its own event-loop thread; `registers` is what the next read returns."""

    def __init__(self) -> None:
        self.registers: dict[int, int] = {}
        self.delay = 0.0
        self._loop = asyncio.new_event_loop()
        self._ready = threading.Event()
        self._server: ModbusTcpServer | None = None
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()
        assert self._ready.wait(5.0), "modbus server did not start"

    async def _action(self, function_code, start_address, address, count, current_registers, set_values):
        if self.delay:
            await asyncio.sleep(self.delay)
        for i in range(len(current_registers)):
            current_registers[i] = self.registers.get(start_address + i, 0)
        return None

    def _run(self) -> None:
        asyncio.set_event_loop(self._loop)

        async def main() -> None:
            device = SimDevice(id=1, simdata=[SimData(0, count=64, values=0, datatype=DataType.REGISTERS)],
                               action=self._action)
            self._server = ModbusTcpServer(device, address=("127.0.0.1", 0))
            task = asyncio.ensure_future(self._server.serve_forever())
            while self._server.transport is None:
                await asyncio.sleep(0.005)
            self._ready.set()
            await task

        self._loop.run_until_complete(main())

    @property
    def port(self) -> int:
        assert self._server is not None
        return self._server.transport.sockets[0].getsockname()[1]

    def stop(self) -> None:
        assert self._server is not None
        asyncio.run_coroutine_threadsafe(self._server.shutdown(), self._loop).result(5.0)
        self._thread.join(5.0)


@pytest.fixture
def server():
    srv = RegisterServer()
    yield srv
    if srv._thread.is_alive():
        srv.stop()


def gauge(server, **kw) -> ModbusGauge:
    return ModbusGauge.tcp("127.0.0.1", server.port, RegisterMap(**kw), timeout=0.3, clock=ManualClock(5.0))


def test_int16_scaled(server):
    # 0.01 kPa per count: 12345 counts = 123.45 kPa
    server.registers = {10: 12345}
    g = gauge(server, address=10, datatype="int16", gain=0.01, unit="kPa")
    r = g.read()
    assert r.valid and r.value == pytest.approx(123.45e3) and r.t == 5.0
    server.registers = {10: 0xFFFF}  # two's complement -1 -> -0.01 kPa
    assert g.read().value == pytest.approx(-10.0)
    g.close()


@pytest.mark.parametrize("order", ["big", "little"])
def test_float32_word_order(server, order):
    # IEEE 754 single precision via struct (Python stdlib), split into two 16-bit words
    hi, lo = struct.unpack(">HH", struct.pack(">f", 1.75))
    server.registers = {20: hi, 21: lo} if order == "big" else {20: lo, 21: hi}
    g = gauge(server, address=20, datatype="float32", word_order=order, unit="bar", table="input")
    assert g.read().value == pytest.approx(1.75 * sc.bar)
    g.close()


def test_uint32_and_range(server):
    value = 70000  # needs 32 bits; Pa
    server.registers = {0: value >> 16, 1: value & 0xFFFF}
    g = gauge(server, address=0, datatype="uint32", unit="Pa", range_max=60000.0)
    r = g.read()
    assert r.validity is Validity.OUT_OF_RANGE and math.isnan(r.value)
    g.close()


def test_nan_register(server):
    hi, lo = struct.unpack(">HH", struct.pack(">f", float("nan")))
    server.registers = {0: hi, 1: lo}
    g = gauge(server, address=0, datatype="float32")
    assert g.read().validity is Validity.NAN
    g.close()


def test_exception_response_is_garbled(server):
    g = gauge(server, address=200)  # outside the server's register block: illegal data address
    assert g.read().validity is Validity.GARBLED
    g.close()


def test_slow_device_is_timeout(server):
    server.delay = 0.6
    g = gauge(server, address=0)
    assert g.read().validity is Validity.TIMEOUT
    g.close()


def test_server_gone_is_disconnected_then_reconnects(server):
    server.registers = {0: 100}
    g = gauge(server, address=0)
    assert g.read().valid
    server.stop()
    assert g.read().validity in (Validity.DISCONNECTED, Validity.TIMEOUT)
    assert g.read().validity is Validity.DISCONNECTED  # refused while the server is down
    g.close()


def test_decode_matches_struct():
    regs = list(struct.unpack(">HH", struct.pack(">i", -123456)))
    assert decode(regs, RegisterMap(address=0, datatype="int32")) == -123456
    assert decode(regs[::-1], RegisterMap(address=0, datatype="int32", word_order="little")) == -123456


def test_one_gauge_per_device_on_a_gateway_until_it_is_closed(server):
    # a Modbus gateway on the network refuses no second program: a claim on host, port and device id
    # keeps a second pycnoctl run off the same gauge (found by a sweep, on VISA), under any spelling of the
    # host; another device id on the same gateway is another gauge
    for host in ("127.0.0.1", "localhost"):
        with held_elsewhere("modbus-tcp", "gauge", key=modbus_tcp_key(host, server.port, 1)):
            with pytest.raises(DeviceDisconnected, match="in use by another pycnoctl run or daemon"):
                gauge(server, address=10)
            gauge(server, address=10, device_id=2).close()
    again = gauge(server, address=10)
    again.close()
