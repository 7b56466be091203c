"""Field types that driver config models share: quantities with units, a serial link, a span.

Why bare numbers are refused: '150' could be kPa or bar, and a driver reading in the wrong unit
reports a wrong pressure with no error.  Every model here is strict (unknown keys are errors)
because a mistyped key in an instrument file would otherwise fall back to a default in silence.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field

from pycnoctl.controller.domain import units
from pycnoctl.drivers.transports import SerialTransport


def _needs_unit(parse: Callable[..., float], example: str) -> Callable[[Any], float]:
    def check(value: Any) -> float:
        if isinstance(value, bool) or not isinstance(value, str | int | float):
            raise ValueError(f"expected a quantity with a unit, e.g. {example!r}")
        if not isinstance(value, str):
            raise ValueError(f"give a unit, e.g. {example!r} (a bare number is ambiguous here)")
        try:
            return parse(value)
        except units.UnitError as exc:
            raise ValueError(str(exc)) from None
    return check


def _seconds(value: Any) -> float:
    try:
        return units.parse_duration(value)
    except units.UnitError as exc:
        raise ValueError(str(exc)) from None


def _signal(value: Any) -> float:
    """An electrical signal: '4 mA' -> 0.004 (A) or '10 V' -> 10.0 (V)."""
    if not isinstance(value, str):
        raise ValueError("give a unit, e.g. '4 mA' or '10 V'")
    try:
        q = units.to_quantity(value, "A")
    except units.UnitError as exc:
        raise ValueError(str(exc)) from None
    for dim, si in (("[current]", "A"), ("[electric_potential]", "V")):
        if q.check(dim):
            return float(q.to(si).magnitude)
    raise ValueError(f"{value!r} is neither a current nor a voltage")


Pressure = Annotated[float, BeforeValidator(_needs_unit(units.parse_pressure, "150 kPa"))]
Temperature = Annotated[float, BeforeValidator(_needs_unit(units.parse_temperature_difference, "0.05 K"))]
Seconds = Annotated[float, BeforeValidator(_seconds), Field(gt=0)]
PressureRate = Annotated[float, BeforeValidator(_needs_unit(units.parse_rate, "100 Pa/h")), Field(ge=0)]
Signal = Annotated[float, BeforeValidator(_signal)]


def pressure_unit(unit: str) -> str:
    """Check that `unit` names a pressure unit (for a driver's 'unit:' key)."""
    try:
        units.parse_pressure(1.0, default_unit=unit)
    except units.UnitError:
        raise ValueError(f"{unit!r} is not a pressure unit (e.g. kPa, bar, psi, mbar, torr)") from None
    return unit


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class RangeModel(Strict):
    """A transducer's rated span, in its reference (gauge or absolute)."""

    min: Pressure | None = None
    max: Pressure | None = None


class SerialLink(Strict):
    """A serial port; devices on the same port share one transport (see serial_transport)."""

    port: str = Field(description="device path (prefer /dev/serial/by-id/...), socket://host:port or loop://")
    baudrate: int = 9600
    timeout: Seconds = 0.5
    eol: str = "\\n"

    def transport(self, name: str) -> SerialTransport:
        from pycnoctl.drivers.relay_ascii import unescape

        return SerialTransport(self.port, name=name, baudrate=self.baudrate, timeout=self.timeout,
                               eol=unescape(self.eol).encode("latin-1"))


def serial_transport(link: SerialLink, ctx: Any) -> SerialTransport:
    """The one transport for link.port in this build (a relay board and a gauge may share a port)."""
    return ctx.once(f"serial:{link.port}", lambda: link.transport(ctx.role))
