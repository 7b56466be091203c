"""A pressure transducer read over Modbus (TCP or RTU) from one or two registers.

Industrial transducers and panel meters often publish the pressure as a holding or input
register: a 16-bit integer with a fixed scale, or a 32-bit integer/float split over two
registers whose word order varies by maker.  All of that is config; read() never raises.

Reply checks: pymodbus checks the frame (CRC-16 on RTU, the transaction id on TCP) and the device
id; read() then wants a normal (not exception) response of the function it asked for, from the
device it asked, with exactly the registers it asked for.  Late replies: RTU frames carry no
transaction id, so after a timed-out request the next one first waits out one more timeout
window; pymodbus drops whatever is waiting before it sends, so the late frame goes with it.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass
from typing import Any, Literal

from pydantic import Field, field_validator, model_validator
from pymodbus.client import ModbusSerialClient, ModbusTcpClient
from pymodbus.exceptions import ConnectionException, ModbusException, ModbusIOException

from pycnoctl.controller.domain.clock import Clock, WallClock
from pycnoctl.controller.domain.devices import Reading, Validity
from pycnoctl.drivers import registry
from pycnoctl.drivers.claims import ResourceClaim, modbus_tcp_key
from pycnoctl.drivers.fields import RangeModel, Seconds, Strict, pressure_unit
from pycnoctl.drivers.gauge_ascii import pascal_per

log = logging.getLogger(__name__)

DataType = Literal["int16", "uint16", "int32", "uint32", "float32"]
_DATATYPES = {
    "int16": ModbusTcpClient.DATATYPE.INT16,
    "uint16": ModbusTcpClient.DATATYPE.UINT16,
    "int32": ModbusTcpClient.DATATYPE.INT32,
    "uint32": ModbusTcpClient.DATATYPE.UINT32,
    "float32": ModbusTcpClient.DATATYPE.FLOAT32,
}


@dataclass(frozen=True)
class RegisterMap:
    """Where the value sits and how to turn it into a pressure."""

    address: int
    table: Literal["holding", "input"] = "holding"
    datatype: DataType = "int16"
    word_order: Literal["big", "little"] = "big"
    device_id: int = 1
    gain: float = 1.0  # pressure = raw * gain + offset, in `unit`
    offset: float = 0.0
    unit: str = "kPa"
    range_min: float | None = None  # Pa
    range_max: float | None = None  # Pa

    @property
    def count(self) -> int:
        return 1 if self.datatype in ("int16", "uint16") else 2


def decode(registers: list[int], regmap: RegisterMap) -> float:
    """Registers -> raw number, with pymodbus's own converter."""
    value = ModbusTcpClient.convert_from_registers(
        registers, _DATATYPES[regmap.datatype], word_order=regmap.word_order)
    return float(value)  # type: ignore[arg-type]


class ModbusGauge:
    """A PressureSensor on a pymodbus synchronous client."""

    def __init__(self, client: Any, regmap: RegisterMap, *, name: str = "pressure",
                 clock: Clock | None = None, late_window: float = 0.0,
                 claim: ResourceClaim | None = None) -> None:
        # a gateway on the network or a shared bus refuses no second program: a claim on the device keeps
        # pycnoctl processes apart (found by a sweep, on VISA); released by close()
        self._claim = claim
        if self._claim is not None:
            self._claim.take()
        self.client = client
        self.regmap = regmap
        self.name = name
        self.clock = clock or WallClock()
        self._pa = pascal_per(regmap.unit)
        self.late_window = late_window  # s a timed-out request's reply stays owed (RTU); 0: none
        self._owed_until: float | None = None

    @classmethod
    def tcp(cls, host: str, port: int, regmap: RegisterMap, *, timeout: float = 1.0,
            **kw: Any) -> ModbusGauge:
        kw.setdefault("claim", ResourceClaim("modbus-tcp", f"{host}:{port} device {regmap.device_id}",
                                             kw.get("name", "pressure"),
                                             key=modbus_tcp_key(host, port, regmap.device_id)))
        return cls(ModbusTcpClient(host, port=port, timeout=timeout, retries=0), regmap, **kw)

    @classmethod
    def rtu(cls, port: str, regmap: RegisterMap, *, baudrate: int = 19200, timeout: float = 1.0,
            **kw: Any) -> ModbusGauge:
        kw.setdefault("late_window", timeout)
        kw.setdefault("claim", ResourceClaim("modbus-rtu", f"{port} device {regmap.device_id}",
                                             kw.get("name", "pressure")))
        return cls(ModbusSerialClient(port, baudrate=baudrate, timeout=timeout, retries=0), regmap, **kw)

    def _wait_out_late_reply(self) -> None:
        until, self._owed_until = self._owed_until, None
        if until is not None and (left := until - time.monotonic()) > 0:
            time.sleep(left)

    def _read_registers(self) -> Any:
        r = self.regmap
        if not self.client.connected and not self.client.connect():
            raise ConnectionException(f"cannot connect to {self.client.comm_params.host}")
        fn = self.client.read_holding_registers if r.table == "holding" else self.client.read_input_registers
        return fn(r.address, count=r.count, device_id=r.device_id)

    def read(self) -> Reading:
        self._wait_out_late_reply()
        t0 = self.clock.now()
        try:
            response = self._read_registers()
        except ConnectionException as exc:
            return self._bad(t0, Validity.DISCONNECTED, f"{self.name}: {exc}")
        except ModbusIOException as exc:
            if self.late_window > 0:
                self._owed_until = time.monotonic() + self.late_window
            return self._bad(t0, Validity.TIMEOUT, f"{self.name}: {exc}")
        except ModbusException as exc:
            return self._bad(t0, Validity.GARBLED, f"{self.name}: {exc}")
        except OSError as exc:
            return self._bad(t0, Validity.DISCONNECTED, f"{self.name}: {exc}")
        return self.interpret(response, 0.5 * (t0 + self.clock.now()))

    def interpret(self, response: Any, t: float) -> Reading:
        """A decoded response -> Reading (pure, so the fuzz test feeds it decoded frames)."""
        if response is None or response.isError():
            return self._bad(t, Validity.GARBLED, f"{self.name}: device answered with exception {response!r}")
        r = self.regmap
        want_fc = 3 if r.table == "holding" else 4
        if getattr(response, "function_code", want_fc) != want_fc:
            return self._bad(t, Validity.GARBLED, f"{self.name}: answer to function "
                             f"{response.function_code}, asked {want_fc}")
        if getattr(response, "dev_id", r.device_id) != r.device_id:
            return self._bad(t, Validity.GARBLED, f"{self.name}: answer from device {response.dev_id}")
        regs = list(getattr(response, "registers", []) or [])
        if len(regs) != self.regmap.count:
            detail = f"{self.name}: {len(regs)} registers, expected {self.regmap.count}"
            return self._bad(t, Validity.GARBLED, detail)
        raw = decode(regs, self.regmap)
        if math.isnan(raw):
            return self._bad(t, Validity.NAN, f"{self.name}: register holds NaN")
        if not math.isfinite(raw):
            return self._bad(t, Validity.OUT_OF_RANGE, f"{self.name}: register holds {raw}")
        pa = (raw * self.regmap.gain + self.regmap.offset) * self._pa
        if (r.range_min is not None and pa < r.range_min) or (r.range_max is not None and pa > r.range_max):
            return self._bad(t, Validity.OUT_OF_RANGE, f"{self.name}: {pa:.6g} Pa outside the rated span")
        return Reading(pa, "Pa", t)

    def _bad(self, t: float, validity: Validity, detail: str) -> Reading:
        log.debug("%s", detail)
        return Reading.invalid("Pa", t, validity, detail)

    def reconnect(self) -> None:
        self.client.close()
        self.client.connect()

    def close(self) -> None:
        self.client.close()
        if self._claim is not None:
            self._claim.release()


# -- config ---------------------------------------------------------------------------------------

class ModbusDevice(Strict):
    kind: Literal["modbus"]
    link: Literal["tcp", "rtu"] = "tcp"
    host: str | None = None  # tcp
    port: int | str = 502  # tcp port number, or the serial device for rtu
    baudrate: int = 19200
    timeout: Seconds = 1.0
    device_id: int = Field(1, ge=0, le=247)
    address: int = Field(ge=0, le=65535)
    table: Literal["holding", "input"] = "holding"
    datatype: DataType = "int16"
    word_order: Literal["big", "little"] = "big"
    gain: float = 1.0
    offset: float = 0.0
    unit: str = "kPa"
    reference: Literal["gauge", "absolute"] = "gauge"
    range: RangeModel | None = None

    @model_validator(mode="after")
    def _link_ok(self) -> ModbusDevice:
        if self.link == "tcp" and (not self.host or not isinstance(self.port, int)):
            raise ValueError("a tcp link needs host and an integer port")
        if self.link == "rtu" and not isinstance(self.port, str):
            raise ValueError("an rtu link needs port: the serial device path")
        return self

    _unit_ok = field_validator("unit")(classmethod(lambda cls, u: pressure_unit(u)))

    def span(self) -> tuple[float | None, float | None]:
        r = self.range or RangeModel()
        return r.min, r.max


def build_modbus(dev: ModbusDevice, ctx: registry.BuildContext) -> ModbusGauge:
    r = dev.range or RangeModel()
    regmap = RegisterMap(address=dev.address, table=dev.table, datatype=dev.datatype, word_order=dev.word_order,
                         device_id=dev.device_id, gain=dev.gain, offset=dev.offset, unit=dev.unit,
                         range_min=r.min, range_max=r.max)
    if dev.link == "tcp":
        return ModbusGauge.tcp(str(dev.host), int(dev.port), regmap, timeout=dev.timeout, name=ctx.role,
                               clock=ctx.clock)
    return ModbusGauge.rtu(str(dev.port), regmap, baudrate=dev.baudrate, timeout=dev.timeout, name=ctx.role,
                           clock=ctx.clock)


registry.register("modbus", registry.PRESSURE, ModbusDevice, build_modbus)
