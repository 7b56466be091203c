"""Types of the gas path that every layer shares: valve roles, chamber volumes, interlock limits.

They are plain data: drivers fill them from an instrument config, the run layer obeys them, the
maths computes with them. Nothing here talks to hardware.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, ValidationInfo, field_validator, model_validator

from pycnoctl.controller.domain.units import (
    UnitError,
    parse_duration,
    parse_fraction,
    parse_gauge_pressure,
    parse_rate,
    parse_volume,
)
from pycnoctl.controller.domain.yamlio import DOCUMENT


class ValveRoles(BaseModel):
    """Which named valve does what in the gas path.

    The standard topology: supply -> inlet -> sample cell (transducer here);
    cell -> expansion valve -> expansion volume (one valve per volume); cell side -> vent -> ambient.
    The one type for valve roles: the instrument config loads it, the simulator derives it.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    inlet: str
    vent: str
    expansion: dict[str, str] = {}  # expansion-volume name -> its valve name
    other: tuple[str, ...] = ()

    @model_validator(mode="after")
    def _one_valve_one_role(self) -> ValveRoles:
        """Each role its own valve.  Why: an expansion volume mapped to the inlet valve opened the inlet in
        every phase that opens the expansion volumes - the safe state and the vented zero among them (a
        run on such a config filled its cell to 1.4 bar during the zero, and no interlock tripped) - and
        one valve for two volumes measured each with the other's volume open."""
        taken: dict[str, str] = {self.inlet: "inlet"}
        wanted = [("vent", self.vent), *((f"expansion.{vol}", valve) for vol, valve in self.expansion.items()),
                  *((f"other[{i}]", valve) for i, valve in enumerate(self.other))]
        for role, valve in wanted:
            if valve in taken:
                raise ValueError(f"{role}: valve {valve!r} is already the {taken[valve]} valve; each role needs "
                                 "a valve of its own")
            taken[valve] = role
        return self

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


def _not_a_fraction() -> Any:
    raise ValueError("expected a fraction, e.g. '1 %'")


def _volume(value: Any, info: ValidationInfo) -> float:
    """A volume: text with a unit from a document ('12.0 cm^3'), a plain float in m^3 from code."""
    if isinstance(value, bool) or ((info.context or {}).get(DOCUMENT) and not isinstance(value, str)):
        raise ValueError("give a unit, e.g. '12.0 cm^3' (a bare number is ambiguous here)")
    if isinstance(value, int | float):
        return float(value)  # m^3 from code, kept bit for bit
    try:
        return parse_volume(value, default_unit="m**3")
    except UnitError as exc:
        raise ValueError(str(exc)) from None


Volume = Annotated[float, BeforeValidator(_volume)]


class Chambers(BaseModel):
    """Chamber volumes in m^3: nominal from the config, overridden per expansion volume by calibration.

    The one type for chambers: the instrument config loads cell and expansion; `calibrated` is
    filled from calibration records at run time, never from a file.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    cell: Volume
    expansion: dict[str, Volume] = {}
    # relative standard uncertainty (k = 1) of the nominal volumes, as the build's drawings or a volume
    # determined elsewhere state it; required before a run may compute with nominal volumes, because a
    # volume nobody calibrated is never known exactly ('1 %' in a file; a plain fraction from code)
    nominal_u: float | None = None
    calibrated: dict[str, ChamberCalibration] = {}

    @field_validator("nominal_u", mode="before")
    @classmethod
    def _fraction(cls, value: Any) -> Any:
        if value is None or isinstance(value, bool):
            return value if value is None else _not_a_fraction()
        try:
            out = parse_fraction(value)
        except UnitError as exc:
            raise ValueError(str(exc)) from None
        if not 0.0 < out <= 0.5:
            raise ValueError("must be above 0 and at most 50 % (a relative standard uncertainty, e.g. '1 %')")
        return out

    @field_validator("calibrated", mode="before")
    @classmethod
    def _not_from_a_file(cls, value: Any, info: ValidationInfo) -> Any:
        if (info.context or {}).get(DOCUMENT):
            raise ValueError("calibrated volumes come from calibration records (pycnoctl calibrate), not a file")
        return value

    def for_expansion(self, name: str) -> ChamberCalibration:
        """The (Vc, Vr, covariance) to compute with when expanding into `name`: the calibration in
        use, else the nominal volumes with the stated relative uncertainty (independent, k = 1)."""
        if name in self.calibrated:
            return self.calibrated[name]
        vc, vr = self.cell, self.expansion[name]
        u = self.nominal_u or 0.0
        return ChamberCalibration(vc, vr, (((u * vc) ** 2, 0.0), (0.0, (u * vr) ** 2)))


def _quantity(
    parse: Callable[..., float], example: str, lo: float, hi: float, what: str
) -> Callable[[Any, ValidationInfo], float]:
    """A limit value: text with a unit from a document, a plain SI float from code; kept within [lo, hi].

    Why a bare number is refused in a document: '2' could be bar, kPa or Pa, and a limit read in
    the wrong unit switches its interlock off without a word.  Why the bounds: a limit outside any
    physical range (a stale time of 1e9 s, a rise rate of 1e12 Pa/s) is the same silent switch.
    """

    def check(value: Any, info: ValidationInfo) -> float:
        if isinstance(value, bool):
            raise ValueError(f"expected a quantity with a unit, e.g. {example!r}")
        if what != "duration" and (info.context or {}).get(DOCUMENT) and _bare(value):
            raise ValueError(f"give a unit, e.g. {example!r} (a bare number is ambiguous here)")
        try:
            out = parse(value, default_unit=_SI[what])
        except UnitError as exc:
            raise ValueError(str(exc)) from None
        if not lo < out <= hi:
            raise ValueError(f"must be above {lo:g} and at most {hi:g} {_SI[what]} "
                             f"(a {what} limit outside this range is a typo that disables its interlock)")
        return out

    return check


def _bare(value: Any) -> bool:
    try:
        float(value)
    except (TypeError, ValueError):
        return False
    return True


_SI = {"pressure": "Pa", "rate": "Pa/s", "duration": "s"}
MAX_GAUGE = 1.0e7  # Pa (100 bar): above any gas pycnometer's cell; a larger limit is a unit slip
MAX_RATE = 1.0e9  # Pa/s: 200 x the fastest regulator failure the tests inject (50 bar/s); above, a slip


def _bounded(dimension: str, example: str, hi: float) -> Any:
    # a limit's pressure is gauge: '1.8 barg' is welcome, '2.8 bara' refused (it would be read as gauge)
    parse = {"pressure": parse_gauge_pressure, "rate": parse_rate, "duration": parse_duration}[dimension]
    return BeforeValidator(_quantity(parse, example, 0.0, hi, dimension))


Gauge = Annotated[float, _bounded("pressure", "150 kPa", MAX_GAUGE)]
RiseRate = Annotated[float, _bounded("rate", "50 kPa/s", MAX_RATE)]
# Time-outs, each with the longest that still protects (s): a sensor silent for over 10 s while
# pressurised, a reading frozen or a leak judged over more than a minute, a vent taking more than
# ten minutes are no longer watched.
MAX_STALE_AFTER = 10.0  # s
StaleTime = Annotated[float, _bounded("duration", "1 s", MAX_STALE_AFTER)]
WatchTime = Annotated[float, _bounded("duration", "5 s", 60.0)]
VentTime = Annotated[float, _bounded("duration", "60 s", 600.0)]


class Limits(BaseModel):
    """Interlock limits; pressures are gauge (above the vented baseline), in Pa.

    What no limit can do: the rules see one sample per sample period, so a step between two samples
    (a regulator failing wide open behind an unmetered inlet) trips only on the next sample, up to
    one period's rise (plus the inlet's closing time) above ``max_pressure``. Keep max_pressure below
    the relief setting by more than that; the relief valve and a metered inlet are the protection.

    The one type for limits: the instrument config and the simulator config both load it, the
    interlock rules (controller.run.interlocks) read it.  Each field names the rule that reads it;
    a new rule adds its fields here, with their bounds, and nowhere else.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    # overpressure; the relief setting (the hardware valve's) is what every pressure limit stays below
    relief_setting: Gauge
    max_pressure: Gauge
    # rise_rate
    max_rise_rate: RiseRate = 2.0e5
    # invalid_pressurised: an invalid reading above this (last valid) gauge pressure trips
    invalid_trip_pressure: Gauge = 2.0e3
    # stale: s without a valid sample
    stale_after: StaleTime = 1.0
    # frozen: s of bit-identical samples while valves move gas
    frozen_after: WatchTime = 5.0
    # inlet_leak: Pa of rise with the inlet commanded closed and no valve change, over the window (s)
    closed_inlet_rise: Gauge = 2.0e3
    closed_inlet_window: WatchTime = 5.0
    # vent_timeout (and the reset): how close to zero counts as vented, and how long a vent may take
    vent_baseline_tolerance: Gauge = 1.0e3
    vent_timeout: VentTime = 60.0
    # supply_pressure (the engine, before it opens the inlet; only with a supply gauge fitted): the
    # highest supply gauge pressure at which the inlet may open
    max_supply_pressure: Gauge | None = None

    @field_validator("max_pressure", "invalid_trip_pressure", "closed_inlet_rise", "vent_baseline_tolerance")
    @classmethod
    def _below(cls, value: float, info: ValidationInfo) -> float:
        """Each pressure limit sits below the one above it: the software trip comes before the relief
        valve, and a threshold at or above max_pressure could never act before the overpressure trip."""
        above = "relief_setting" if info.field_name == "max_pressure" else "max_pressure"
        if above not in info.data:  # refused on its own
            return value
        if value >= info.data[above]:
            if above == "relief_setting":
                raise ValueError(f"max_pressure {value:.6g} Pa must be below the relief valve's setting "
                                 f"{info.data[above]:.6g} Pa (the software trip comes first)")
            raise ValueError(f"{info.field_name} {value:.6g} Pa must be below max_pressure {info.data[above]:.6g} Pa")
        if info.field_name == "vent_baseline_tolerance":
            wide = vented_band_problem("vent_baseline_tolerance", value, info.data[above])
            if wide is not None:
                raise ValueError(wide)
        return value


#: The largest share of max_pressure a 'vented' band may be (the instrument's limit, a sequence's vent)
VENTED_SHARE = 0.1


def vented_band_problem(key: str, tolerance: float, max_pressure: float,
                        trip: str = "max_pressure") -> str | None:
    """Why a band around zero that counts as vented is too wide against the instrument's trip, or None.

    Found by a sweep: 170 kPa under a 180 kPa max_pressure was accepted (and 50 kPa in a sequence's vent):
    a cell at 1.6 bar then counted as vented - a reset allowed, a vent stuck shut unseen."""
    if tolerance <= VENTED_SHARE * max_pressure:
        return None
    return (f"{key} {tolerance / 1e3:.4g} kPa would call a cell that far above the lab's pressure vented; at "
            f"most a tenth of {trip} ({VENTED_SHARE * max_pressure / 1e3:.4g} kPa)")


#: s: the shortest sample period a config may give.  Every tick reads each device once and writes a trace
#: row; at 9600 baud one ten-character exchange with a gauge takes about 10 ms, so nothing real answers
#: faster, and the simulator's dry run (check) at 1 us ran for minutes without an end (found by a sweep).
#: m^3: the largest chamber volume a config may give (100 litres; the largest cells hold cores of a few litres)
MAX_CHAMBER = 0.1


def chamber_problem(where: str, volume: float) -> str | None:
    """Why ``volume`` (m^3) cannot be a pycnometer chamber's (None when it can): '12 m^3' for '12 cm^3'.

    ``where`` names the key ('chambers.cell') where the message does not already stand at it ('')."""
    at = f"{where}: " if where else ""
    if not volume > 0:
        return f"{at}a chamber volume must be positive, got {volume * 1e6:g} cm^3"
    if volume > MAX_CHAMBER * (1.0 + 1e-9):  # the unit conversion's rounding: exactly 100 litres loads
        return (f"{at}{volume * 1e6:g} cm^3 is more than {MAX_CHAMBER * 1e3:g} litres, "
                "beyond any gas pycnometer's chamber: give the volume in cm^3")
    return None


MIN_SAMPLE_PERIOD = 0.01


def sample_period_problem(sample_period: float) -> str | None:
    """Why ``sample_period`` is too short to be an instrument's (None when it is not)."""
    if sample_period >= MIN_SAMPLE_PERIOD:
        return None
    return (f"sample_period {sample_period:g} s is shorter than {MIN_SAMPLE_PERIOD:g} s: every sample reads each "
            "device once and writes a trace row, and no transducer on a serial or network link answers that fast "
            "(one short exchange at 9600 baud takes about 10 ms); give the period the transducer updates at")


def stale_problem(sample_period: float, stale_after: float, *, note: str = "") -> str | None:
    """Why a transducer read every ``sample_period`` s cannot run under the stale-reading limit
    ``limits.stale_after`` of ``stale_after`` s (``note``: where that value comes from, e.g. 'its
    default'), or None.

    The stale interlock trips once no valid pressure sample has come for longer than stale_after; one
    sample period apart from the last, every sample of a longer period is such a gap, so the instrument
    faulted at its first tick.  An equal period leaves no margin: any sample late by a millisecond
    trips it.  The interlock layer cannot know the period, so the loaders refuse it, naming both values."""
    if sample_period < stale_after:
        return None
    return (f"sample_period {sample_period:g} s is not shorter than the stale-reading limit, limits.stale_after "
            f"{stale_after:g} s{f' ({note})' if note else ''}: the stale interlock trips when no valid pressure "
            f"sample has come for longer than {stale_after:g} s, so "
            + ("every sample would trip it (the instrument faults at its first tick)"
               if sample_period > stale_after else "any sample that comes late would trip it")
            + f"; make sample_period shorter, or limits.stale_after longer (at most {MAX_STALE_AFTER:g} s)")
