"""A SCPI meter reading a transducer's analogue output (4-20 mA loop or a voltage), scaled linearly.

A 4-20 mA loop has a live zero: 4 mA is the bottom of the range, so a current well below it
means the loop is broken, and must never be read as "0 bar".  Below `open_loop_below` the
reading is OPEN_LOOP; above `over_above` it is OUT_OF_RANGE.  SCPI meters report an overload
as 9.9E37 (and 9.91E37 for "not a number"; SCPI-99 vol. 1 §7.2.1, quoted from memory): both
are caught as invalid.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Literal

from pydantic import Field

from pycnoctl.controller.domain.clock import Clock, WallClock
from pycnoctl.controller.domain.devices import DeviceDisconnected, DeviceError, DeviceTimeout, Reading, Validity
from pycnoctl.drivers import registry
from pycnoctl.drivers.fields import Pressure, Seconds, Signal, Strict
from pycnoctl.drivers.gauge_ascii import NUMBER
from pycnoctl.drivers.transports import Transport, VisaTransport

log = logging.getLogger(__name__)

SCPI_OVERLOAD = 9.9e37
SCPI_NAN = 9.91e37


@dataclass(frozen=True)
class LoopScaling:
    """signal (A or V) -> pressure (Pa) through two points, with validity bounds on the signal."""

    signal_low: float = 4e-3  # A
    signal_high: float = 20e-3  # A
    pressure_low: float = 0.0  # Pa at signal_low
    pressure_high: float = 3.5e5  # Pa at signal_high
    open_loop_below: float | None = 3.6e-3  # A; None for a voltage output with no live zero
    over_above: float | None = 20.5e-3  # A
    under_below: float | None = None  # signal below this (but above open loop) is OUT_OF_RANGE

    def __post_init__(self) -> None:
        if self.signal_high == self.signal_low:
            raise ValueError("signal_low and signal_high must differ")

    def to_pressure(self, signal: float) -> float:
        span = (self.pressure_high - self.pressure_low) / (self.signal_high - self.signal_low)
        return self.pressure_low + (signal - self.signal_low) * span

    def classify(self, signal: float) -> tuple[float, Validity, str]:
        if not math.isfinite(signal) or abs(abs(signal) - SCPI_NAN) < 1e34:
            return math.nan, Validity.NAN, f"meter reports {signal!r}"
        if abs(signal) >= 0.999 * SCPI_OVERLOAD:
            return math.nan, Validity.OUT_OF_RANGE, "meter overload"
        if self.open_loop_below is not None and signal < self.open_loop_below:
            limit = self.open_loop_below
            return math.nan, Validity.OPEN_LOOP, f"{signal:.6g} below the live-zero limit {limit:.6g}"
        if self.over_above is not None and signal > self.over_above:
            return math.nan, Validity.OUT_OF_RANGE, f"{signal:.6g} above {self.over_above:.6g}"
        if self.under_below is not None and signal < self.under_below:
            return math.nan, Validity.OUT_OF_RANGE, f"{signal:.6g} below {self.under_below:.6g}"
        return self.to_pressure(signal), Validity.VALID, ""


def classify_reply(reply: bytes, scaling: LoopScaling) -> tuple[float, Validity, str]:
    """One reply message (termination removed by VISA) -> (Pa, validity, detail).  The whole
    message must be one SCPI decimal number: two numbers, a unit, a stray byte or a cut-off
    exponent make it GARBLED, never the part that happens to parse."""
    text = reply.decode("ascii", "replace")
    if not NUMBER.fullmatch(text):
        return math.nan, Validity.GARBLED, f"reply {reply!r} is not one number"
    return scaling.classify(float(text))


class VisaTransducerMeter:
    """A PressureSensor: a SCPI meter measuring the transducer output, through a VisaTransport."""

    def __init__(self, transport: Transport, *, scaling: LoopScaling | None = None,
                 query: str = "MEAS:CURR:DC?", setup: tuple[str, ...] = (), name: str = "pressure",
                 clock: Clock | None = None, timeout: float | None = None) -> None:
        self.transport = transport
        self.scaling = scaling or LoopScaling()
        self.query = query.encode("ascii")
        self.setup = tuple(setup)
        self.name = name
        self.clock = clock or WallClock()
        self.timeout = timeout
        self.configure()

    def configure(self) -> None:
        """Send the setup commands (function, range, integration time) once after opening."""
        for cmd in self.setup:
            self.transport.write(cmd.encode("ascii"))

    def read(self) -> Reading:
        t0 = self.clock.now()
        try:
            reply = self.transport.query(self.query, self.timeout)
        except DeviceTimeout as exc:
            return Reading.invalid("Pa", t0, Validity.TIMEOUT, str(exc))
        except DeviceDisconnected as exc:
            return Reading.invalid("Pa", t0, Validity.DISCONNECTED, str(exc))
        except DeviceError as exc:
            return Reading.invalid("Pa", t0, Validity.GARBLED, str(exc))
        t = 0.5 * (t0 + self.clock.now())
        value, validity, detail = classify_reply(reply, self.scaling)
        if validity is not Validity.VALID:
            return Reading.invalid("Pa", t, validity, detail)
        return Reading(value, "Pa", t)

    def reconnect(self) -> None:
        self.transport.reopen()
        self.configure()

    def close(self) -> None:
        self.transport.close()


# -- config ---------------------------------------------------------------------------------------

class LoopScaleModel(Strict):
    signal_low: Signal = 4e-3
    signal_high: Signal = 20e-3
    pressure_low: Pressure
    pressure_high: Pressure


class VisaMeterDevice(Strict):
    kind: Literal["visa_meter"]
    resource: str
    backend: str = "@py"
    timeout: Seconds = 1.0
    query: str = "MEAS:CURR:DC?"
    setup: list[str] = Field(default_factory=list)
    scale: LoopScaleModel
    open_loop_below: Signal | None = 3.6e-3
    over_above: Signal | None = 20.5e-3
    reference: Literal["gauge", "absolute"] = "gauge"

    def span(self) -> tuple[float | None, float | None]:
        s = self.scaling()
        top = s.to_pressure(self.over_above) if self.over_above is not None else self.scale.pressure_high
        return self.scale.pressure_low, top

    def scaling(self) -> LoopScaling:
        s = self.scale
        return LoopScaling(signal_low=s.signal_low, signal_high=s.signal_high, pressure_low=s.pressure_low,
                           pressure_high=s.pressure_high, open_loop_below=self.open_loop_below,
                           over_above=self.over_above)


def build_meter(dev: VisaMeterDevice, ctx: registry.BuildContext) -> VisaTransducerMeter:
    t = VisaTransport(dev.resource, name=ctx.role, backend=dev.backend, timeout=dev.timeout)
    ctx.opened.append(t)
    return VisaTransducerMeter(t, scaling=dev.scaling(), query=dev.query, setup=tuple(dev.setup),
                               name=ctx.role, clock=ctx.clock)


registry.register("visa_meter", registry.PRESSURE, VisaMeterDevice, build_meter)
