"""The assembled instrument the engine runs: role drivers, valve roles, chambers and limits.

The engine never asks which drivers serve a role; it gets an Instrument built from the
instrument config (real hardware) or from the simulator, and talks only to the protocols.
"""

from __future__ import annotations

import hashlib
import json
import logging
from dataclasses import dataclass, field

from pycnoctl.controller.domain.clock import Clock
from pycnoctl.controller.domain.devices import Barometer, DeviceError, PressureSensor, Thermometer, ValveBank
from pycnoctl.controller.domain.gaspath import Chambers, Limits, ValveRoles
from pycnoctl.drivers.guarded import SAFE_STATE_DEADLINE, GuardedValveBank, apply_steps, safe_order

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
    # the supply line's gauge (Pa above ambient) between the regulator and the inlet, where fitted: read
    # before every inlet opening (limits.max_supply_pressure), so a failed regulator is met by a closed inlet
    supply: PressureSensor | None = None
    sample_period: float = 0.1  # s between pressure samples
    pressure_u: float = 20.0  # Pa, standard uncertainty of one zeroed reading (Type B, datasheet)
    # Pa, the transducer's systematic deviation from a straight line (non-linearity, hysteresis): the
    # part of its error that neither the zero taken every cycle nor the pressure ratio (which cancels a
    # gain error) removes.  None: not stated, pressure_u is taken (cautious).
    pressure_u_linearity: float | None = None
    temperature_u: float = 0.05  # K, standard uncertainty of the gas temperature
    barometer_u: float = 5.0  # Pa, noise of one barometer reading
    # Pa/s, the fastest lab-pressure change assumed where no barometer reads it: 100 Pa per hour, a
    # brisk change of weather (from memory); budgeted over each cycle's time since its zero
    ambient_drift_rate: float = 100.0 / 3600.0
    ambient_nominal: float = 101325.0  # Pa, used when no barometer serves
    gas: str = "helium"  # the gas the instrument is plumbed for
    extras: dict[str, object] = field(default_factory=dict)  # e.g. the simulator behind the drivers
    safe_state_error: str | None = None  # why the last safe-state attempt was not confirmed
    # who this pycnometer is: the config's instrument_id (or its name); a simulated one adds a digest of
    # its simulated geometry.  Calibrations are bound to it and refused on any other instrument.
    identity: str = ""
    simulated: bool = False

    def __post_init__(self) -> None:
        if not self.identity:
            self.identity = self.name

    @property
    def fingerprint(self) -> str:
        """A digest of what a calibration depends on besides the identity: nominal chambers, valve
        roles and the transducer's reference.  A change warns that the calibration may no longer fit."""
        return fingerprint(self.chambers, self.roles, self.pressure_is_gauge)

    def safe_state(self) -> bool:
        """Assert the safe state; idempotent, never raises. Returns False if it was not confirmed.

        Inlet closed first, then every path to vent opened, each valve tried whatever the one before
        raised, within one deadline for the whole attempt (drivers.guarded.apply_steps)."""
        try:
            if isinstance(self.valves, GuardedValveBank):
                self.valves.set_valves(self.roles.safe_state())
            else:
                failures = apply_steps(self.valves, safe_order(self.roles.safe_state(), self.roles),
                                       SAFE_STATE_DEADLINE)
                if failures:
                    raise DeviceError("valves", f"safe state incomplete: {failures[0][2]}")
        except Exception as exc:  # whatever the board or the guard raised, the caller gets False
            log.error("safe state not confirmed: %s: %s", type(exc).__name__, exc)
            self.safe_state_error = f"{type(exc).__name__}: {exc}"
            return False
        self.safe_state_error = None
        return True

    def reconnect(self) -> dict[str, str | None]:
        """Operator reset after a communication fault: reopen each device that can (by its stable
        path), then assert the safe state. Returns role -> None (ok) or the error; never raises."""
        result: dict[str, str | None] = {}
        for role in ("valves", "pressure", "thermometer", "barometer", "supply"):
            dev = getattr(self, role)
            fn = getattr(dev, "reconnect", None) if dev is not None else None
            if fn is None:
                continue
            try:
                fn()
                result[role] = None
            except Exception as exc:  # a reset reports every device; one failing must not hide the rest
                result[role] = str(exc)
        result["safe_state"] = None if self.safe_state() else "safe state not confirmed"
        return result

    def close(self) -> None:
        """Safe state, then release every device (errors on release are logged, not raised)."""
        self.safe_state()
        devices: list[object] = [self.valves, self.pressure, self.thermometer, self.barometer, self.supply]
        for dev in devices:
            if dev is None:
                continue
            try:
                dev.close()  # type: ignore[attr-defined]
            except Exception as exc:  # release must not mask the original problem
                log.warning("closing %r failed: %s", dev, exc)


def fingerprint(chambers: Chambers, roles: ValveRoles, pressure_is_gauge: bool) -> str:
    """12 hex digits of SHA-256 over the calibration-relevant configuration (stable across runs)."""
    data = {"cell": chambers.cell, "expansion": dict(sorted(chambers.expansion.items())),
            "inlet": roles.inlet, "vent": roles.vent, "valves": dict(sorted(roles.expansion.items())),
            "gauge": pressure_is_gauge}
    return hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()[:12]
