"""The assembled instrument the engine runs: role drivers, valve roles, chambers and limits.

The engine never asks which drivers serve a role; it gets an Instrument built from the
instrument config (real hardware) or from the simulator, and talks only to the protocols.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

from pycnoctl.drivers.base import Barometer, DeviceError, PressureSensor, Thermometer, ValveBank
from pycnoctl.drivers.clock import Clock

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class ValveRoles:
    """Which named valve does what in the gas path.

    The standard topology: supply -> inlet -> sample cell (transducer here);
    cell -> expansion valve -> expansion volume (one valve per volume); cell side -> vent -> ambient.
    """

    inlet: str
    vent: str
    expansion: dict[str, str]  # expansion-volume name -> its valve name
    other: tuple[str, ...] = ()

    def safe_state(self) -> dict[str, bool]:
        """Inlet closed, every path to vent open, so no volume holds trapped gas."""
        state = {self.inlet: False, self.vent: True}
        state.update({valve: True for valve in self.expansion.values()})
        return state


@dataclass(frozen=True)
class ChamberCalibration:
    """Calibrated cell and expansion volume for one expansion volume, with their covariance (m^3, m^6)."""

    vc: float
    vr: float
    cov: tuple[tuple[float, float], tuple[float, float]] = ((0.0, 0.0), (0.0, 0.0))
    record_id: str | None = None


@dataclass(frozen=True)
class Chambers:
    """Chamber volumes in m^3: nominal from the config, overridden per expansion volume by calibration."""

    cell: float
    expansion: dict[str, float]
    calibrated: dict[str, ChamberCalibration] = field(default_factory=dict)

    def for_expansion(self, name: str) -> ChamberCalibration:
        """The (Vc, Vr, covariance) to compute with when expanding into `name`."""
        if name in self.calibrated:
            return self.calibrated[name]
        return ChamberCalibration(self.cell, self.expansion[name])


@dataclass(frozen=True)
class Limits:
    """Interlock limits; pressures are gauge (above the vented baseline), in Pa."""

    max_pressure: float  # absolute overpressure trip
    relief_setting: float  # the hardware relief valve's set pressure, for validation only
    max_rise_rate: float = 2.0e5  # Pa/s
    invalid_trip_pressure: float = 2.0e3  # an invalid reading above this (last valid) gauge pressure trips
    stale_after: float = 1.0  # s without a valid sample
    frozen_after: float = 5.0  # s of bit-identical samples while valves move gas
    closed_inlet_rise: float = 2.0e3  # Pa of rise with the inlet commanded closed and no expansion
    closed_inlet_window: float = 5.0  # s over which that rise is judged
    vent_baseline_tolerance: float = 1.0e3  # Pa
    vent_timeout: float = 60.0  # s


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
