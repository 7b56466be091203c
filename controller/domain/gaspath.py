"""Types of the gas path that every layer shares: valve roles, chamber volumes, interlock limits.

They are plain data: drivers fill them from an instrument config, the run layer obeys them, the
maths computes with them. Nothing here talks to hardware.
"""

from __future__ import annotations

from dataclasses import dataclass, field


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
