"""The simulator config: the simulated instrument's truth, validated like every other input.

Why a separate model: the sim config says what the instrument *is* (true volumes, leaks, faults),
while the instrument the engine sees is derived from it (roles, chambers, limits).  Every value may
carry a unit ('12 cm^3', '22 degC', '0.3 mm'); inside everything is SI.  Unknown keys are refused,
and cross-references (valve ends, fault targets) are checked with file:line:col positions.
See sim/README.md for the format with examples.
"""

from __future__ import annotations

import contextlib
import math
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationError,
    ValidationInfo,
    field_validator,
)

from pycnoctl.controller.domain.gas import get_gas
from pycnoctl.controller.domain.gaspath import Limits, chamber_problem, sample_period_problem, stale_problem
from pycnoctl.controller.domain.text import plain
from pycnoctl.controller.domain.units import (
    UnitError,
    lab_pressure_problem,
    lab_temperature_problem,
    parse_duration,
    parse_gauge_pressure,
    parse_length,
    parse_pressure,
    parse_pressure_on,
    parse_pressure_spec,
    parse_rate,
    parse_temperature,
    parse_temperature_difference,
    parse_volume,
    to_quantity,
)
from pycnoctl.controller.domain.yamlio import DOCUMENT, ConfigError, Document, Loc, load_file, validate

CONFIG_DIR = Path(__file__).resolve().parent / "configs"
DEFAULT_CONFIG = CONFIG_DIR / "clean.yaml"
RESERVED_NODES = ("supply", "ambient")
DEVICES = ("valves", "pressure", "thermometer", "barometer")


def _si(value: Any, default_unit: str, si_unit: str, noun: str) -> float:
    """Parse a quantity of a kind the shared parsers do not cover (conductance, frequency, K/s)."""
    q = to_quantity(value, default_unit, difference=True)
    try:
        out = float(q.to(si_unit).magnitude)
    except Exception as exc:
        raise UnitError(f"{value!r} is not {noun}") from exc
    if not math.isfinite(out):
        raise UnitError(f"{value!r} is not a finite number")
    return out


def _nonneg(f):  # type: ignore[no-untyped-def]
    def check(v: Any) -> float:
        out = f(v)
        if out < 0.0:
            raise ValueError(f"must not be negative, got {v!r}")
        return out
    return check


def _pos(f):  # type: ignore[no-untyped-def]
    def check(v: Any) -> float:
        out = f(v)
        if out <= 0.0:
            raise ValueError(f"must be positive, got {v!r}")
        return out
    return check


Pressure = Annotated[float, BeforeValidator(lambda v: parse_pressure(v))]
PosPressure = Annotated[float, BeforeValidator(_pos(lambda v: parse_pressure(v)))]
NonNegPressure = Annotated[float, BeforeValidator(_nonneg(lambda v: parse_pressure(v)))]
# a pressure above the lab's: the trade's gauge tags are welcome ('1.4 barg'), an absolute one refused
GaugePressure = Annotated[float, BeforeValidator(lambda v: parse_gauge_pressure(v))]
PosGaugePressure = Annotated[float, BeforeValidator(_pos(lambda v: parse_gauge_pressure(v)))]
Temperature = Annotated[float, BeforeValidator(lambda v: parse_temperature(v))]


def _pressure_step(value: Any) -> float:
    """A step of the lab's pressure (Pa): a change, the same on the gauge and the absolute scale, so a
    gauge tag ('5 mbarg', as a gauge shows the change) changes nothing and is accepted; an absolute tag
    names a level ('1013 hPa abs'), which this key is not, so it is refused rather than taken as a change."""
    pa, gauge = parse_pressure_spec(value)
    if gauge is False:
        raise ValueError(f"{value!r} is tagged absolute, but pressure_step is a change of the lab's pressure, not "
                         "the level it steps to: give the change, e.g. '5 mbar' (a gauge tag is accepted)")
    return pa


PressureStep = Annotated[float, BeforeValidator(_pressure_step)]


def _plausible(parse: Any, problem: Any) -> Any:
    """A validator that parses a value and refuses it where ``problem`` says no lab has it."""
    def check(v: Any) -> float:
        out = parse(v)
        why = problem(v, out)
        if why is not None:
            raise ValueError(why)
        return float(out)
    return check


# a lab's air pressure and temperature: a bare number in the wrong unit (1013 for hPa, 295 for K) is refused
LabPressure = Annotated[float, BeforeValidator(_plausible(parse_pressure, lab_pressure_problem))]
LabTemperature = Annotated[float, BeforeValidator(_plausible(parse_temperature, lab_temperature_problem))]
TempDiff = Annotated[float, BeforeValidator(lambda v: parse_temperature_difference(v))]
NonNegTempDiff = Annotated[float, BeforeValidator(_nonneg(lambda v: parse_temperature_difference(v)))]
# a chamber's volume, or a specimen's: '12 m^3' for '12 cm^3' is refused as the instrument config refuses it
ChamberVolume = Annotated[float, BeforeValidator(_plausible(parse_volume, lambda v, out: chamber_problem("", out)))]
SpecimenVolume = Annotated[float, BeforeValidator(
    _plausible(_nonneg(lambda v: parse_volume(v)), lambda v, out: chamber_problem("", out) if out else None))]
PosDuration = Annotated[float, BeforeValidator(_pos(lambda v: parse_duration(v)))]
NonNegDuration = Annotated[float, BeforeValidator(_nonneg(lambda v: parse_duration(v)))]
PosLength = Annotated[float, BeforeValidator(_pos(lambda v: parse_length(v)))]
Rate = Annotated[float, BeforeValidator(lambda v: parse_rate(v))]
PosRate = Annotated[float, BeforeValidator(_pos(lambda v: parse_rate(v)))]
Conductance = Annotated[
    float, BeforeValidator(_nonneg(lambda v: _si(v, "m**3/s", "m**3/s", "a conductance (volume/time)")))
]
Frequency = Annotated[float, BeforeValidator(_pos(lambda v: _si(v, "Hz", "Hz", "a frequency")))]
TempRate = Annotated[float, BeforeValidator(lambda v: _si(v, "K/s", "K/s", "a temperature rate"))]
Fraction = Annotated[float, Field(gt=0.0, le=1.0)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Wave(_Strict):
    """A slow sinusoidal swing (daily cycle of a lab, air-conditioning)."""

    amplitude: float = 0.0  # SI of the quantity it modulates (parsed by the owner)
    period: PosDuration = 3600.0


class PressureWave(Wave):
    amplitude: NonNegPressure = 0.0


class TemperatureWave(Wave):
    amplitude: NonNegTempDiff = 0.0


class Lab(_Strict):
    temperature: LabTemperature = 295.15
    pressure: LabPressure = 101325.0
    temperature_drift: TempRate = 0.0
    temperature_wave: TemperatureWave | None = None
    pressure_drift: Rate = 0.0
    pressure_wave: PressureWave | None = None


class Supply(_Strict):
    set_pressure: PosGaugePressure = 1.4e5  # what the regulator delivers
    cylinder_pressure: PosGaugePressure = 150e5  # the ceiling of a failed regulator
    temperature: LabTemperature | None = None  # default: lab temperature


class Volume(_Strict):
    volume: ChamberVolume
    thermal_tau: PosDuration | None = 3.0  # None (null) = adiabatic walls


class Sample(_Strict):
    solid_volume: SpecimenVolume = 0.0
    pore_volume: SpecimenVolume = 0.0  # open pores that fill slowly
    pore_tau: PosDuration = 60.0  # pore pressure relaxes to a steady cell pressure with this time constant
    pore_thermal_tau: PosDuration = 0.5


class Restriction(_Strict):
    between: tuple[str, str]
    diameter: PosLength = 1e-3
    cd: Fraction = 0.7


class Valve(Restriction):
    role: Literal["inlet", "vent", "expansion", "other"] = "other"
    leak: Conductance = 0.0  # past the closed seat
    # a solenoid valve stays open this long after it is commanded closed (opening is taken as instant):
    # what the software's trip cannot shorten.  0 s (the default) keeps the shipped benches as they were;
    # small solenoid valves take some milliseconds (a typical figure, from memory: 5-30 ms).
    close_time: NonNegDuration = 0.0


class Relief(_Strict):
    node: str = "cell"
    set_pressure: PosGaugePressure
    reseat: PosGaugePressure | None = None  # where it starts to lift; default 0.95 x set (full lift at set)
    diameter: PosLength = 1.5e-3
    cd: Fraction = 0.7


class SensorBase(_Strict):
    noise: float = 0.0
    zero_offset: float = 0.0
    resolution: float = 0.0
    update_rate: Frequency = 100.0
    lag: NonNegDuration = 0.0


class PressureInstrument(SensorBase):
    node: str = "cell"
    kind: Literal["gauge", "absolute"] = "gauge"
    # the range's ends are on the transducer's own scale: its tag is welcome ('3.5 barg' on a gauge
    # transducer, as its label says), the other scale's refused (it would be read on this one)
    full_scale: float = 3.5e5
    range_min: float = 0.0
    noise: NonNegPressure = 0.0
    zero_offset: Pressure = 0.0
    resolution: NonNegPressure = 0.0

    @field_validator("full_scale", "range_min", mode="before")
    @classmethod
    def _on_its_scale(cls, value: Any, info: ValidationInfo) -> float:
        kind = info.data.get("kind")  # absent when refused on its own: no tag is checked against it
        pa = parse_pressure_spec(value)[0] if kind is None else parse_pressure_on(value, kind)
        if info.field_name == "full_scale" and pa <= 0.0:
            raise ValueError(f"must be positive, got {value!r}")
        return pa

    # terminal-based non-linearity: the largest deviation from the straight line through the range's ends,
    # at mid-range, as a fraction of the span (a parabola: 0 at both ends).  Calibrated datasheets of
    # thin-film gauges state 0.05-0.25 % (from memory); 0 is a perfectly linear transducer.
    nonlinearity: Annotated[float, Field(ge=0.0, le=0.05)] = 0.0


class ThermometerInstrument(SensorBase):
    at: str = "wall"  # 'wall' (lab/wall temperature) or a node name (gas temperature)
    noise: NonNegTempDiff = 0.0
    zero_offset: TempDiff = 0.0
    resolution: NonNegTempDiff = 0.0
    update_rate: Frequency = 10.0


class BarometerInstrument(SensorBase):
    noise: NonNegPressure = 0.0
    zero_offset: Pressure = 0.0
    resolution: NonNegPressure = 0.0
    update_rate: Frequency = 10.0


class Instruments(_Strict):
    pressure: PressureInstrument = PressureInstrument()
    thermometer: ThermometerInstrument | None = ThermometerInstrument()
    barometer: BarometerInstrument | None = BarometerInstrument()
    supply_gauge: bool = False  # a gauge on the supply line (reads what the regulator delivers, exactly)


class OnOpening(_Strict):
    valve: str
    count: Annotated[int, Field(ge=1)] = 1


class OnPressure(_Strict):
    node: str = "cell"
    pressure: GaugePressure


FaultKind = Literal[
    "valve_stuck", "valve_leak", "regulator_failure", "transducer", "disconnect",
    "ambient_step", "lab_temperature_step",
]
TransducerMode = Literal["frozen", "silent", "garbled", "nan", "drifting"]


class Fault(_Strict):
    """One scheduled failure.  Trigger: ``at`` a time, ``on_opening`` the Nth opening of a valve, or
    ``on_pressure_above`` a gauge pressure at a node; then ``delay``; it clears after ``duration``."""

    kind: FaultKind
    at: NonNegDuration | None = None
    on_opening: OnOpening | None = None
    on_pressure_above: OnPressure | None = None
    delay: NonNegDuration = 0.0
    duration: PosDuration | None = None
    valve: str | None = None  # valve_stuck, valve_leak
    open: bool = True  # valve_stuck: stuck open (True) or closed (False)
    conductance: Conductance | None = None  # valve_leak
    rate: PosRate | None = None  # regulator_failure: rise of the delivered pressure
    mode: TransducerMode | None = None  # transducer
    drift_rate: Rate = 0.0  # transducer 'drifting': zero drift
    device: Literal["valves", "pressure", "thermometer", "barometer"] | None = None  # disconnect
    pressure_step: PressureStep | None = None  # ambient_step
    temperature_step: TempDiff | None = None  # lab_temperature_step


class Nominal(_Strict):
    """Volumes the instrument believes in (e.g. a deliberately wrong calibration); default: the truth."""

    cell: ChamberVolume | None = None
    expansion: dict[str, ChamberVolume] = {}
    # relative standard uncertainty the build states for its nominal volumes (k = 1); e.g. 0.005
    u: Annotated[float, Field(gt=0.0, le=0.5)] = 0.005


class Solver(_Strict):
    """Integration controls: accuracy of the dense output and of the flow steps."""

    rel_moles: Annotated[float, Field(gt=0.0, le=0.2)] = 0.08
    interp_tol: PosPressure = 2.0  # Pa, error of interpolating pressure between steps...
    interp_rel: Annotated[float, Field(ge=0.0, le=1.0)] = 0.02  # ...or this share of the step's change
    max_step: PosDuration = 10.0
    first_step: PosDuration = 1e-3
    coupling: Annotated[float, Field(gt=0.0, le=10.0)] = 0.05  # step / thermal tau while flowing and relaxing
    thermal_tol: NonNegTempDiff = 1e-3  # K from the wall below which that limit is lifted


class SimConfig(_Strict):
    name: Annotated[str, AfterValidator(plain)] = "simulated pycnometer"
    description: str = ""
    # the noise realisation; None: a fresh one for every simulated instrument (the generator takes 0 and up)
    seed: Annotated[int, Field(ge=0)] | None = None
    gas: str = "helium"
    cell: str = "cell"  # which volume is the sample cell
    lab: Lab = Lab()
    supply: Supply = Supply()
    volumes: dict[str, Volume]
    sample: Sample = Sample()
    valves: dict[str, Valve]
    links: list[Restriction] = []  # always-open restrictions (fittings, frits) between volumes
    relief: Relief | None = None
    instruments: Instruments = Instruments()
    initial_open: list[str] = []
    faults: list[Fault] = []
    nominal: Nominal | None = None
    limits: dict[str, Any] = {}  # Limits keys (gauge); unset ones: see instrument_limits
    sample_period: PosDuration = 0.1
    solver: Solver = Solver()

    # -- cross-reference checks, each with the YAML path it concerns
    def problems(self) -> list[tuple[Loc, str]]:
        out: list[tuple[Loc, str]] = []
        try:
            get_gas(self.gas)
        except ValueError as exc:
            out.append((("gas",), str(exc)))
        nodes = set(self.volumes) | set(RESERVED_NODES)
        for name in self.volumes:
            if name in RESERVED_NODES:
                out.append((("volumes", name), f"{name!r} is reserved (the supply and ambient are built in)"))
            if name.endswith(".pores"):
                out.append((("volumes", name), "names ending in '.pores' are reserved"))
        if self.cell not in self.volumes:
            out.append((("cell",), f"the cell {self.cell!r} is not one of the volumes"))
        else:
            s = self.sample
            if s.solid_volume + s.pore_volume >= self.volumes[self.cell].volume:
                out.append((("sample",), "solid plus pore volume must be smaller than the cell volume"))
        roles: dict[str, list[str]] = {"inlet": [], "vent": [], "expansion": []}
        for vname, v in self.valves.items():
            a, b = v.between
            for k, end in enumerate(v.between):
                if end not in nodes:
                    out.append((("valves", vname, "between", k), f"unknown node {end!r}"))
            if a == b:
                out.append((("valves", vname, "between"), "a valve needs two different ends"))
            if v.role in roles:
                roles[v.role].append(vname)
            ends = {a, b}
            if v.role == "inlet" and "supply" not in ends:
                out.append((("valves", vname, "role"), "an inlet valve connects the supply"))
            if v.role == "vent" and "ambient" not in ends:
                out.append((("valves", vname, "role"), "a vent valve connects to ambient"))
            if v.role == "expansion" and (self.cell not in ends or ends & set(RESERVED_NODES)):
                out.append((("valves", vname, "role"),
                            f"an expansion valve joins the cell {self.cell!r} and an expansion volume"))
        for role in ("inlet", "vent"):
            if len(roles[role]) != 1:
                out.append((("valves",), f"exactly one valve with role {role!r} is needed, "
                                         f"found {len(roles[role])}"))
        # one expansion valve per volume: the expansion volumes are named by their far end, so a second
        # valve into the same volume hid a volume and measured with both open (found by a sweep: exit 0,
        # -23 million cm3, no expansion at all)
        into: dict[str, str] = {}
        for vname, far in self.expansion_volumes().items():
            if far in into:
                out.append((("valves", vname, "between"), f"expansion valves {into[far]!r} and {vname!r} both "
                            f"open into {far!r}: give each expansion volume its own valve"))
            into.setdefault(far, vname)
        for k, lk in enumerate(self.links):
            for j, end in enumerate(lk.between):
                if end not in self.volumes:
                    out.append((("links", k, "between", j), f"unknown volume {end!r}"))
        if self.relief is not None and self.relief.node not in self.volumes:
            out.append((("relief", "node"), f"unknown volume {self.relief.node!r}"))
        # the valve lifts from reseat to full bore at set_pressure: a reseat at or above it is a slip (the
        # cell then rose to the reseat, past the set pressure the limits are checked against)
        if self.relief is not None and self.relief.reseat is not None \
                and self.relief.reseat >= self.relief.set_pressure:
            out.append((("relief", "reseat"),
                        f"relief.reseat {self.relief.reseat / 1e5:.6g} bar (gauge) is not below the relief's "
                        f"set_pressure {self.relief.set_pressure / 1e5:.6g} bar: the valve starts to lift at "
                        "reseat and is fully open at set_pressure; leave reseat out for 0.95 x set_pressure"))
        ins = self.instruments
        if ins.pressure.node not in self.volumes:
            out.append((("instruments", "pressure", "node"), f"unknown volume {ins.pressure.node!r}"))
        if ins.pressure.full_scale <= ins.pressure.range_min:
            out.append((("instruments", "pressure", "full_scale"), "must be above range_min"))
        th = ins.thermometer
        if th is not None and th.at != "wall" and th.at not in self.volumes:
            out.append((("instruments", "thermometer", "at"), f"'wall' or a volume, not {th.at!r}"))
        for k, name in enumerate(self.initial_open):
            if name not in self.valves:
                out.append((("initial_open", k), f"unknown valve {name!r}"))
        opened = {self.valves[n].role for n in self.initial_open if n in self.valves}
        if {"inlet", "vent"} <= opened:  # the combination the valve layer refuses to command
            out.append((("initial_open",), "the inlet and the vent cannot start open together "
                        "(supply straight to ambient)"))
        if self.nominal is not None:
            for name in self.nominal.expansion:
                if name not in self.expansion_volumes().values():
                    out.append((("nominal", "expansion", name), f"{name!r} is not an expansion volume"))
        for k, f in enumerate(self.faults):
            out.extend(_fault_problems(self, k, f))
        # a regulator set at or above the relief valve is a wrong value - a bare 140 is read as bar - not a
        # failure to simulate: that is the regulator_failure fault's job. (Above a transducer's range is
        # allowed: an out-of-range reading is a case to simulate.)
        if self.relief is not None and self.supply.set_pressure >= self.relief.set_pressure:
            out.append((("supply", "set_pressure"),
                        f"supply.set_pressure {self.supply.set_pressure / 1e5:.6g} bar (gauge; a bare number is bar) "
                        f"is not below the relief valve's set pressure, {self.relief.set_pressure / 1e5:.6g} bar: "
                        "give the regulator's setting; a regulator that fails open is simulated by a fault, not "
                        "by its setting"))
        short = sample_period_problem(self.sample_period)
        if short is not None:
            out.append((("sample_period",), short))
        try:
            limits = self.instrument_limits()
            if self.relief is not None and limits.relief_setting > self.relief.set_pressure:
                out.append((("limits", "relief_setting"),
                            f"limits.relief_setting: {limits.relief_setting:.6g} Pa is above the simulated relief "
                            f"valve's set pressure {self.relief.set_pressure:.6g} Pa: the limits would be "
                            "checked against a relief that does not exist"))
            stale = stale_problem(self.sample_period, limits.stale_after,
                                  note="" if "stale_after" in self.limits else "its default")
            if stale is not None:  # at the key the file gives (the sample period where both are given)
                blame: Loc = ("sample_period",) if "sample_period" in self.model_fields_set or \
                    "stale_after" not in self.limits else ("limits", "stale_after")
                out.append((blame, stale))
            p_in = self.instruments.pressure
            if 1.0 / p_in.update_rate >= limits.frozen_after:
                # a reading that changes only every 1/update_rate s is bit-identical for that long, which
                # the frozen-reading interlock takes for a dead transducer while valves move gas
                out.append((("instruments", "pressure", "update_rate"),
                            f"instruments.pressure.update_rate {p_in.update_rate:g} Hz gives a new reading every "
                            f"{1.0 / p_in.update_rate:g} s, not sooner than the frozen-reading limit "
                            f"limits.frozen_after {limits.frozen_after:g} s: the frozen interlock would trip at the "
                            "first fill; make the update rate faster, or limits.frozen_after longer"))
        except ValidationError as exc:
            derived_from: Loc = ("relief", "set_pressure") if self.relief else ("instruments", "pressure", "full_scale")
            errors = exc.errors()
            refused_relief = any(err["loc"] == ("relief_setting",) for err in errors)
            for err in errors:
                if refused_relief and err["loc"] == ("max_pressure",) and "max_pressure" not in self.limits:
                    continue  # not derived from a relief setting that is refused at its own line
                loc: Loc = ("limits", *err["loc"])
                unknown = err["type"] == "extra_forbidden"
                msg = f"limits.{loc[-1]}: " + err["msg"].removeprefix("Value error, ")
                if loc[-1] in ("relief_setting", "max_pressure") and loc[-1] not in self.limits:
                    loc, msg = derived_from, f"{msg} (derived from here; set limits.{loc[-1]} to override)"
                out.append((loc, f"unknown key {loc[-1]!r}" if unknown else msg))
        return out

    def instrument_limits(self) -> Limits:
        """The derived instrument's interlock limits: the ``limits`` section over defaults.

        The relief setting defaults to the relief valve's (or the transducer's full scale), the
        maximum pressure to 90 % of it; the rest to the Limits defaults.  A relief setting the section
        gives that is not a gauge pressure derives nothing: it is refused at its own line, and a
        max_pressure made up in its place would be a second, spurious refusal.
        """
        relief = self.relief.set_pressure if self.relief is not None else self.instruments.pressure.full_scale
        derived: dict[str, Any] = {"relief_setting": f"{relief!r} Pa"}
        given = self.limits.get("relief_setting", derived["relief_setting"])
        # refused at limits.relief_setting: max_pressure stays unset unless the section gives it
        with contextlib.suppress(UnitError, TypeError):
            derived["max_pressure"] = f"{0.9 * parse_gauge_pressure(given)!r} Pa"
        return Limits.model_validate({**derived, **self.limits}, context={DOCUMENT: True})

    def expansion_volumes(self) -> dict[str, str]:
        """valve name -> expansion volume name, for valves with role 'expansion'."""
        out = {}
        for vname, v in self.valves.items():
            if v.role == "expansion":
                a, b = v.between
                out[vname] = b if a == self.cell else a
        return out


#: the fault keys that belong to one kind or another
_KIND_KEYS = frozenset({"valve", "open", "conductance", "rate", "mode", "drift_rate", "device", "pressure_step",
                        "temperature_step"})
_ACTS_ON = {"transducer": "the pressure transducer", "regulator_failure": "the supply's regulator",
            "ambient_step": "the lab's pressure", "lab_temperature_step": "the lab's temperature"}


def _fault_problems(cfg: SimConfig, k: int, f: Fault) -> list[tuple[Loc, str]]:
    loc: Loc = ("faults", k)
    out: list[tuple[Loc, str]] = []
    triggers = [x for x in (f.at, f.on_opening, f.on_pressure_above) if x is not None]
    if len(triggers) > 1:
        out.append((loc, "give one trigger: at, on_opening or on_pressure_above"))
    if f.on_opening is not None and f.on_opening.valve not in cfg.valves:
        out.append(((*loc, "on_opening", "valve"), f"unknown valve {f.on_opening.valve!r}"))
    if f.on_pressure_above is not None and f.on_pressure_above.node not in cfg.volumes:
        out.append(((*loc, "on_pressure_above", "node"), f"unknown volume {f.on_pressure_above.node!r}"))
    need: dict[str, tuple[str, ...]] = {
        "valve_stuck": ("valve",), "valve_leak": ("valve", "conductance"), "regulator_failure": ("rate",),
        "transducer": ("mode",), "disconnect": ("device",), "ambient_step": ("pressure_step",),
        "lab_temperature_step": ("temperature_step",),
    }
    for key in need[f.kind]:
        if getattr(f, key) is None:
            out.append((loc, f"a {f.kind} fault needs {key!r}"))
    # a key another kind uses is refused, not ignored (found by a sweep: a transducer fault with device:
    # thermometer loaded and made the pressure transducer read NaN)
    uses = {**need, "valve_stuck": ("valve", "open"), "transducer": ("mode", "drift_rate")}
    for key in sorted(_KIND_KEYS - set(uses[f.kind]) & f.model_fields_set):
        out.append(((*loc, key), f"a {f.kind} fault takes no {key!r} (it acts on "
                                 f"{_ACTS_ON.get(f.kind, 'what its own keys name')})"))
    if f.valve is not None and f.valve not in cfg.valves:
        out.append(((*loc, "valve"), f"unknown valve {f.valve!r}"))
    return out


def check(cfg: SimConfig) -> SimConfig:
    """Raise ValueError listing cross-reference problems of a config built in code."""
    probs = cfg.problems()
    if probs:
        raise ValueError("; ".join(f"{'.'.join(map(str, loc))}: {msg}" for loc, msg in probs))
    return cfg


def load_sim_config(path: str | Path | None = None) -> SimConfig:
    """Load and validate a simulator config (None: the shipped clean default); ConfigError on problems."""
    doc: Document = load_file(DEFAULT_CONFIG if path is None else path)
    cfg = validate(SimConfig, doc)
    probs = cfg.problems()
    if probs:
        raise ConfigError([doc.problem(loc, msg) for loc, msg in probs])
    return cfg


def shipped_configs() -> dict[str, Path]:
    """Name -> path of the configs shipped in sim/configs."""
    return {p.stem: p for p in sorted(CONFIG_DIR.glob("*.yaml"))}


def config_from_dict(data: dict[str, Any]) -> SimConfig:
    """Validate a config given as plain data (tests, programmatic use)."""
    return check(SimConfig.model_validate(data))
