"""A pressure gauge that answers a text query: query string, reply regex, linear scaling, unit.

read() never raises for a bad sample: a silent gauge, a reply that does not parse, a 'NaN'
or an 'overrange' word, or a value outside the rated span all come back as an invalid
Reading with the reason, so the interlocks see "no usable pressure", never a number.

A reply is read only if the *whole* line (the transport has removed its terminator) matches
the reply pattern, the value is one plain decimal number (sign, point and exponent allowed;
no spaces, underscores, 'inf' or hex), and the unit in the reply, where the pattern has a
`unit` group, is the configured unit.  A partial, doubled or unit-less reply is GARBLED.
"""

from __future__ import annotations

import logging
import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

from pydantic import Field, field_validator

from pycnoctl.controller.domain.clock import Clock, WallClock
from pycnoctl.controller.domain.devices import DeviceDisconnected, DeviceError, DeviceTimeout, Reading, Validity
from pycnoctl.controller.domain.units import parse_pressure, parse_temperature
from pycnoctl.drivers import registry
from pycnoctl.drivers.fields import RangeModel, SerialLink, pressure_unit, serial_transport
from pycnoctl.drivers.relay_ascii import FrameTemplate, Template
from pycnoctl.drivers.transports import Transport

log = logging.getLogger(__name__)


def pascal_per(unit: str) -> float:
    """Pa in one `unit` (any pint pressure unit: 'kPa', 'bar', 'psi', 'mbar', 'torr', ...)."""
    return parse_pressure(1.0, default_unit=unit)


@dataclass(frozen=True)
class GaugeFormat:
    """How one kind of gauge is asked and how its reply is read."""

    query: str = "P?\\n"
    regex: str = r"^P (?P<value>\S+) (?P<unit>\S+)$"  # matched against the whole reply line
    unit: str = "kPa"  # unit of the scaled value
    gain: float = 1.0  # pressure = raw * gain + offset, in `unit`
    offset: float = 0.0
    overrange_words: tuple[str, ...] = ("OVER", "UNDER", "OVERRANGE", "UNDERRANGE", "OR", "UR")
    nan_words: tuple[str, ...] = ("NAN", "NaN", "nan", "----", "ERR")
    range_min: float | None = None  # SI (Pa or K), in the reading's reference (gauge or absolute)
    range_max: float | None = None
    timeout: float | None = None  # s; None uses the transport's


def si_converter(quantity: str, unit: str) -> tuple[Callable[[float], float], str]:
    """A function from a value in `unit` to SI, and the SI unit name (Pa or K)."""
    if quantity == "pressure":
        factor = pascal_per(unit)
        return (lambda x: x * factor), "Pa"
    if quantity == "temperature":
        parse_temperature(1.0, default_unit=unit)  # fail early on a bad unit
        return (lambda x: parse_temperature(x, default_unit=unit)), "K"
    raise ValueError(f"quantity must be 'pressure' or 'temperature', not {quantity!r}")


#: A plain decimal number as PROTOCOL.md allows it.  float() alone is too lenient: it takes
#: '1_000', ' 12 ', 'infinity' and non-ASCII digits.
NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


def classify_text(raw: str, fmt: GaugeFormat, to_si: Callable[[float], float],
                  rx: re.Pattern[str]) -> tuple[float, Validity, str]:
    """Reply line (terminator removed) -> (SI value, validity, detail).  Pure, so it is tested
    without a device.  The pattern must match the whole line, not a prefix of it."""
    m = rx.fullmatch(raw)
    if not m:
        return math.nan, Validity.GARBLED, f"reply {raw!r} does not match {rx.pattern!r}"
    unit = m.groupdict().get("unit")
    if unit is not None and unit != fmt.unit:
        return math.nan, Validity.GARBLED, f"reply unit {unit!r} is not the configured {fmt.unit!r}"
    token = m.group("value")
    if token is None:
        return math.nan, Validity.GARBLED, f"reply {raw!r} has no value"
    upper = token.upper()
    if upper in {w.upper() for w in fmt.overrange_words}:
        return math.nan, Validity.OUT_OF_RANGE, f"gauge says {token!r}"
    if token in fmt.nan_words or upper in {w.upper() for w in fmt.nan_words}:
        return math.nan, Validity.NAN, f"gauge says {token!r}"
    if not NUMBER.fullmatch(token):
        return math.nan, Validity.GARBLED, f"value {token!r} is not a number"
    raw_value = float(token)
    if not math.isfinite(raw_value):  # e.g. '1e999'
        return math.nan, Validity.OUT_OF_RANGE, f"gauge says {token!r}"
    try:
        si = to_si(raw_value * fmt.gain + fmt.offset)
    except ValueError as exc:  # e.g. a temperature below absolute zero
        return math.nan, Validity.OUT_OF_RANGE, str(exc)
    if fmt.range_min is not None and si < fmt.range_min:
        return math.nan, Validity.OUT_OF_RANGE, f"{si:.6g} below the rated {fmt.range_min:.6g} (SI)"
    if fmt.range_max is not None and si > fmt.range_max:
        return math.nan, Validity.OUT_OF_RANGE, f"{si:.6g} above the rated {fmt.range_max:.6g} (SI)"
    return si, Validity.VALID, ""


class AsciiGauge:
    """A PressureSensor (or, with quantity='temperature', a Thermometer) on a Transport."""

    def __init__(self, transport: Transport, *, fmt: GaugeFormat | None = None, name: str = "pressure",
                 clock: Clock | None = None, absolute: bool = False, quantity: str = "pressure") -> None:
        self.transport = transport
        self.fmt = fmt or GaugeFormat()
        self.name = name
        self.clock = clock or WallClock()
        self.absolute = absolute
        self._query = FrameTemplate.parse(self.fmt.query, ()).render()
        self._rx = re.compile(self.fmt.regex)
        if "value" not in self._rx.groupindex:
            raise ValueError(f"gauge regex {self.fmt.regex!r} needs a named group (?P<value>...)")
        self._to_si, self.si_unit = si_converter(quantity, self.fmt.unit)
        self.last_error: DeviceError | None = None

    def read(self) -> Reading:
        t0 = self.clock.now()
        try:
            reply = self.transport.query(self._query, self.fmt.timeout)
        except DeviceTimeout as exc:
            return self._bad(t0, Validity.TIMEOUT, exc)
        except DeviceDisconnected as exc:
            return self._bad(t0, Validity.DISCONNECTED, exc)
        except DeviceError as exc:
            return self._bad(t0, Validity.GARBLED, exc)
        t = 0.5 * (t0 + self.clock.now())
        text = reply.decode("ascii", "replace")
        value, validity, detail = classify_text(text, self.fmt, self._to_si, self._rx)
        if validity is not Validity.VALID:
            log.debug("%s: %s (%s)", self.name, validity.value, detail)
            return Reading.invalid(self.si_unit, t, validity, detail)
        self.last_error = None
        return Reading(value, self.si_unit, t)

    def _bad(self, t0: float, validity: Validity, exc: DeviceError) -> Reading:
        self.last_error = exc
        log.debug("%s: %s", self.name, exc)
        return Reading.invalid(self.si_unit, 0.5 * (t0 + self.clock.now()), validity, str(exc))

    def reconnect(self) -> None:
        self.transport.reopen()

    def close(self) -> None:
        self.transport.close()


# -- config ---------------------------------------------------------------------------------------

def reply_pattern(pattern: str) -> str:
    """A reply regex must compile and capture the reading as the group 'value': found at load, not
    as every sample read garbled (or a traceback) once the run has started."""
    try:
        rx = re.compile(pattern)
    except re.error as exc:
        raise ValueError(f"invalid regular expression {pattern!r}: {exc}") from None
    if "value" not in rx.groupindex:
        raise ValueError(f"the pattern {pattern!r} has no group named 'value' (write (?P<value>...))")
    return pattern


class AsciiGaugeDevice(SerialLink):
    kind: Literal["ascii_gauge"]
    query: Template = GaugeFormat.query
    regex: str = GaugeFormat.regex
    unit: str = GaugeFormat.unit
    gain: float = 1.0
    offset: float = 0.0
    reference: Literal["gauge", "absolute"] = "gauge"
    range: RangeModel | None = None
    overrange_words: list[str] = Field(default_factory=lambda: list(GaugeFormat.overrange_words))
    nan_words: list[str] = Field(default_factory=lambda: list(GaugeFormat.nan_words))

    _unit_ok = field_validator("unit")(classmethod(lambda cls, u: pressure_unit(u)))
    _regex_ok = field_validator("regex")(classmethod(lambda cls, r: reply_pattern(r)))

    def fmt(self) -> GaugeFormat:
        r = self.range or RangeModel()
        return GaugeFormat(query=self.query, regex=self.regex, unit=self.unit, gain=self.gain,
                           offset=self.offset, overrange_words=tuple(self.overrange_words),
                           nan_words=tuple(self.nan_words), range_min=r.min, range_max=r.max)

    def span(self) -> tuple[float | None, float | None]:
        r = self.range or RangeModel()
        return r.min, r.max


class AsciiThermometerDevice(SerialLink):
    kind: Literal["ascii_thermometer"]
    query: Template = "T?\\n"
    regex: str = r"^T\s+(?P<value>\S+)"
    unit: str = "degC"
    gain: float = 1.0
    offset: float = 0.0

    _regex_ok = field_validator("regex")(classmethod(lambda cls, r: reply_pattern(r)))


def build_gauge(dev: AsciiGaugeDevice, ctx: registry.BuildContext) -> AsciiGauge:
    return AsciiGauge(serial_transport(dev, ctx), fmt=dev.fmt(), name=ctx.role, clock=ctx.clock,
                      absolute=dev.reference == "absolute")


def build_thermometer(dev: AsciiThermometerDevice, ctx: registry.BuildContext) -> AsciiGauge:
    fmt = GaugeFormat(query=dev.query, regex=dev.regex, unit=dev.unit, gain=dev.gain, offset=dev.offset)
    return AsciiGauge(serial_transport(dev, ctx), fmt=fmt, name=ctx.role, clock=ctx.clock,
                      quantity="temperature")


registry.register("ascii_gauge", registry.PRESSURE, AsciiGaugeDevice, build_gauge)
registry.register("ascii_thermometer", registry.TEMPERATURE, AsciiThermometerDevice, build_thermometer)
