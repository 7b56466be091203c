"""Role interfaces of the hardware abstraction layer.

The engine talks to hardware only through these small protocols, so any object with the right
methods serves: a relay board on a serial port, a VISA meter, or the simulator.  Readings are
never bare numbers: each carries its time stamp and a validity flag, and an invalid reading
holds NaN so that it cannot be mistaken for a pressure.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Protocol, runtime_checkable


class Validity(enum.Enum):
    """Why a reading can or cannot be used."""

    VALID = "valid"
    TIMEOUT = "timeout"  # device silent or partial reply
    GARBLED = "garbled"  # reply did not parse
    NAN = "nan"  # device reported a non-number
    OUT_OF_RANGE = "out_of_range"  # outside the sensor's rated span
    OPEN_LOOP = "open_loop"  # 4-20 mA loop below live zero: broken wire
    STALE = "stale"  # too old for the control loop
    FROZEN = "frozen"  # identical values for too long
    DISCONNECTED = "disconnected"  # transport gone


@dataclass(frozen=True, slots=True)
class Reading:
    """One sample from a sensor, in SI units (Pa, K)."""

    value: float
    unit: str
    t: float
    validity: Validity = Validity.VALID
    detail: str = ""

    def __post_init__(self) -> None:
        if self.validity is Validity.VALID and not math.isfinite(self.value):
            object.__setattr__(self, "validity", Validity.NAN)
        if self.validity is not Validity.VALID and not math.isnan(self.value):
            object.__setattr__(self, "value", math.nan)

    @property
    def valid(self) -> bool:
        return self.validity is Validity.VALID

    @classmethod
    def invalid(cls, unit: str, t: float, validity: Validity, detail: str = "") -> Reading:
        return cls(math.nan, unit, t, validity, detail)


class DeviceError(Exception):
    """A device did not do what was asked; carries enough context to find out why."""

    def __init__(self, device: str, message: str, command: str | bytes | None = None,
                 reply: str | bytes | None = None) -> None:
        self.device = device
        self.command = command
        self.reply = reply
        parts = [f"{device}: {message}"]
        if command is not None:
            parts.append(f"command {command!r}")
        if reply is not None:
            parts.append(f"reply {reply!r}")
        super().__init__("; ".join(parts))


class DeviceTimeout(DeviceError):
    """No reply, or only part of one, within the timeout."""


class ProtocolError(DeviceError):
    """The device replied, but not in the expected form."""


class DeviceDisconnected(DeviceError):
    """The transport is gone (USB unplugged, socket closed)."""


class ForbiddenValveState(Exception):
    """A requested valve combination is refused before any command is sent."""


@runtime_checkable
class ValveBank(Protocol):
    """Named solenoid valves. True means open (gas path connected)."""

    @property
    def valve_names(self) -> tuple[str, ...]: ...

    def set_valves(self, states: Mapping[str, bool]) -> None:
        """Command the named valves; others keep their commanded state."""

    def commanded(self) -> dict[str, bool]:
        """The state last commanded for every valve."""

    def read_back(self) -> dict[str, bool] | None:
        """The state the board reports, or None where the board cannot tell."""

    def close(self) -> None: ...


@runtime_checkable
class PressureSensor(Protocol):
    """A pressure transducer; read() never raises for a bad sample, it returns an invalid Reading."""

    name: str

    def read(self) -> Reading: ...

    def close(self) -> None: ...


@runtime_checkable
class Thermometer(Protocol):
    name: str

    def read(self) -> Reading: ...

    def close(self) -> None: ...


@runtime_checkable
class Barometer(Protocol):
    name: str

    def read(self) -> Reading: ...

    def close(self) -> None: ...
