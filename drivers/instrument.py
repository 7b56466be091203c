"""The assembled instrument the engine runs: role drivers, valve roles, chambers and limits.

The engine never asks which drivers serve a role; it gets an Instrument built from the
instrument config (real hardware) or from the simulator, and talks only to the protocols.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

from pycnoctl.controller.domain.clock import Clock
from pycnoctl.controller.domain.devices import Barometer, DeviceError, PressureSensor, Thermometer, ValveBank
from pycnoctl.controller.domain.gaspath import Chambers, Limits, ValveRoles

log = logging.getLogger(__name__)


@dataclass
class Instrument:
    """Everything the engine needs to run a sequence on one pycnometer."""

    name: str
    valves: ValveBank
    pressure: PressureSensor
    clock: Clock
    roles: ValveRoles
    chambers: Chambers
    limits: Limits
    pressure_is_gauge: bool = True
    thermometer: Thermometer | None = None
    barometer: Barometer | None = None
    sample_period: float = 0.1  # s between pressure samples
    pressure_u: float = 20.0  # Pa, standard uncertainty of one zeroed reading (Type B, datasheet)
    temperature_u: float = 0.05  # K, standard uncertainty of the gas temperature
    ambient_nominal: float = 101325.0  # Pa, used when no barometer serves
    gas: str = "helium"  # the gas the instrument is plumbed for
    extras: dict[str, object] = field(default_factory=dict)  # e.g. the simulator behind the drivers

    def safe_state(self) -> bool:
        """Assert the safe state; idempotent. Returns False if the board would not take it."""
        try:
            self.valves.set_valves(self.roles.safe_state())
        except DeviceError as exc:
            log.error("safe state not confirmed: %s", exc)
            return False
        return True

    def reconnect(self) -> dict[str, str | None]:
        """Operator reset after a communication fault: reopen each device that can (by its stable
        path), then assert the safe state. Returns role -> None (ok) or the error; never raises."""
        result: dict[str, str | None] = {}
        for role in ("valves", "pressure", "thermometer", "barometer"):
            dev = getattr(self, role)
            fn = getattr(dev, "reconnect", None) if dev is not None else None
            if fn is None:
                continue
            try:
                fn()
                result[role] = None
            except DeviceError as exc:
                result[role] = str(exc)
        result["safe_state"] = None if self.safe_state() else "safe state not confirmed"
        return result

    def close(self) -> None:
        """Safe state, then release every device (errors on release are logged, not raised)."""
        self.safe_state()
        devices: list[object] = [self.valves, self.pressure, self.thermometer, self.barometer]
        for dev in devices:
            if dev is None:
                continue
            try:
                dev.close()  # type: ignore[attr-defined]
            except Exception as exc:  # release must not mask the original problem
                log.warning("closing %r failed: %s", dev, exc)
