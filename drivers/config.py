"""The instrument config: which driver serves each role, and how the gas path is laid out.

A new relay board or transducer should be a config entry, not code: the relay board's command
templates, the gauge's query and reply regex, scaling and units all live here.  Loading is
strict (unknown keys, bad units, impossible limits are errors with file:line:col) because a
mistake here opens the wrong valve.  build_instrument() turns a config into the Instrument the
engine runs, with the valve bank always behind a GuardedValveBank.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    field_validator,
    model_validator,
)

from pycnoctl.controller.domain import units, yamlio
from pycnoctl.controller.domain.clock import Clock, WallClock
from pycnoctl.controller.domain.devices import PressureSensor, Thermometer, ValveBank
from pycnoctl.controller.domain.gas import get_gas
from pycnoctl.controller.domain.gaspath import Chambers, Limits, ValveRoles
from pycnoctl.drivers.gauge_ascii import AsciiGauge, GaugeFormat
from pycnoctl.drivers.guarded import GuardedValveBank, violations
from pycnoctl.drivers.instrument import Instrument
from pycnoctl.drivers.relay_ascii import AsciiRelayBoard, Channel, FrameTemplate, RelayCommands, unescape
from pycnoctl.drivers.transports import SerialTransport, Transport, VisaTransport

log = logging.getLogger(__name__)

STANDARD_ATMOSPHERE = 101325.0  # Pa (scipy.constants.atm); ambient assumed when comparing gauge/absolute


# -- quantities with units ----------------------------------------------------------------------

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
Volume = Annotated[float, BeforeValidator(_needs_unit(units.parse_volume, "12.0 cm^3"))]
Rate = Annotated[float, BeforeValidator(_needs_unit(units.parse_rate, "50 kPa/s"))]
Temperature = Annotated[float, BeforeValidator(_needs_unit(units.parse_temperature_difference, "0.05 K"))]
Seconds = Annotated[float, BeforeValidator(_seconds), Field(gt=0)]
Signal = Annotated[float, BeforeValidator(_signal)]


def _template(value: Any) -> str:
    if not isinstance(value, str):
        raise ValueError("a command template must be a string")
    FrameTemplate.parse(value)  # raises ValueError with the reason
    return value


Template = Annotated[str, BeforeValidator(_template)]


def _pressure_unit(unit: str) -> str:
    try:
        units.parse_pressure(1.0, default_unit=unit)
    except units.UnitError:
        raise ValueError(f"{unit!r} is not a pressure unit (e.g. kPa, bar, psi, mbar, torr)") from None
    return unit


def _reply_pattern(pattern: str) -> str:
    """A reply regex must compile and capture the reading as the group 'value': found at load, not
    as every sample read garbled (or a traceback) once the run has started."""
    try:
        rx = re.compile(pattern)
    except re.error as exc:
        raise ValueError(f"invalid regular expression {pattern!r}: {exc}") from None
    if "value" not in rx.groupindex:
        raise ValueError(f"the pattern {pattern!r} has no group named 'value' (write (?P<value>...))")
    return pattern


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


# -- devices --------------------------------------------------------------------------------------

class SerialLink(Strict):
    port: str = Field(description="device path (prefer /dev/serial/by-id/...), socket://host:port or loop://")
    baudrate: int = 9600
    timeout: Seconds = 0.5
    eol: str = "\\n"

    def transport(self, name: str) -> SerialTransport:
        return SerialTransport(self.port, name=name, baudrate=self.baudrate, timeout=self.timeout,
                               eol=unescape(self.eol).encode("latin-1"))


class RelayCommandsModel(Strict):
    set: Template = RelayCommands.set
    energise: str | int = RelayCommands.energise
    de_energise: str | int = RelayCommands.de_energise
    ack: str | None = RelayCommands.ack
    error: str | None = RelayCommands.error
    readback: Template | None = RelayCommands.readback
    readback_regex: str = RelayCommands.readback_regex
    mask_base: Literal[2, 10, 16] = 16
    all_off: Template | None = RelayCommands.all_off
    ping: Template | None = RelayCommands.ping
    ping_reply: str = RelayCommands.ping_reply
    arm_watchdog: Template | None = RelayCommands.arm_watchdog

    def build(self) -> RelayCommands:
        return RelayCommands(**self.model_dump())


class ValveChannel(Strict):
    channel: int = Field(ge=1, le=64)
    normally: Literal["open", "closed"] = "closed"


class AsciiRelayDevice(SerialLink):
    kind: Literal["ascii_relay"]
    commands: RelayCommandsModel = RelayCommandsModel()
    valves: dict[str, ValveChannel] = Field(min_length=1)
    watchdog: Seconds | None = None  # arm the board's own watchdog (PROTOCOL.md) with this timeout

    @field_validator("valves")
    @classmethod
    def _distinct_channels(cls, valves: dict[str, ValveChannel]) -> dict[str, ValveChannel]:
        seen: dict[int, str] = {}
        for name, v in valves.items():
            if v.channel in seen:
                raise ValueError(f"valves {seen[v.channel]!r} and {name!r} are both on relay {v.channel}")
            seen[v.channel] = name
        return valves

    def valve_names(self) -> tuple[str, ...]:
        return tuple(self.valves)


class SimDevice(Strict):
    kind: Literal["sim"]
    config: str | None = None  # simulator config file; None for the simulator's default


class RangeModel(Strict):
    min: Pressure | None = None
    max: Pressure | None = None


class AsciiGaugeDevice(SerialLink):
    kind: Literal["ascii_gauge"]
    query: Template = GaugeFormat.query
    regex: str = GaugeFormat.regex
    unit: str = GaugeFormat.unit
    gain: float = 1.0
    offset: float = 0.0
    reference: Literal["gauge", "absolute"] = "gauge"
    range: RangeModel | None = None
    overrange_words: list[str] = list(GaugeFormat.overrange_words)
    nan_words: list[str] = list(GaugeFormat.nan_words)

    _unit_ok = field_validator("unit")(classmethod(lambda cls, u: _pressure_unit(u)))
    _regex_ok = field_validator("regex")(classmethod(lambda cls, r: _reply_pattern(r)))

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

    _regex_ok = field_validator("regex")(classmethod(lambda cls, r: _reply_pattern(r)))


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
    setup: list[str] = []
    scale: LoopScaleModel
    open_loop_below: Signal | None = 3.6e-3
    over_above: Signal | None = 20.5e-3
    reference: Literal["gauge", "absolute"] = "gauge"

    def span(self) -> tuple[float | None, float | None]:
        from pycnoctl.drivers.visa_meter import LoopScaling

        s = self.scaling(LoopScaling)
        top = s.to_pressure(self.over_above) if self.over_above is not None else self.scale.pressure_high
        return self.scale.pressure_low, top

    def scaling(self, cls: Any) -> Any:
        s = self.scale
        return cls(signal_low=s.signal_low, signal_high=s.signal_high, pressure_low=s.pressure_low,
                   pressure_high=s.pressure_high, open_loop_below=self.open_loop_below,
                   over_above=self.over_above)


class ModbusDevice(Strict):
    kind: Literal["modbus"]
    link: Literal["tcp", "rtu"] = "tcp"
    host: str | None = None  # tcp
    port: int | str = 502  # tcp port number, or the serial device for rtu
    baudrate: int = 19200
    timeout: Seconds = 1.0
    device_id: int = Field(1, ge=0, le=247)
    address: int = Field(ge=0, le=65535)
    table: Literal["holding", "input"] = "holding"
    datatype: Literal["int16", "uint16", "int32", "uint32", "float32"] = "int16"
    word_order: Literal["big", "little"] = "big"
    gain: float = 1.0
    offset: float = 0.0
    unit: str = "kPa"
    reference: Literal["gauge", "absolute"] = "gauge"
    range: RangeModel | None = None

    @model_validator(mode="after")
    def _link_ok(self) -> ModbusDevice:
        if self.link == "tcp" and (not self.host or not isinstance(self.port, int)):
            raise ValueError("a tcp link needs host and an integer port")
        if self.link == "rtu" and not isinstance(self.port, str):
            raise ValueError("an rtu link needs port: the serial device path")
        return self

    _unit_ok = field_validator("unit")(classmethod(lambda cls, u: _pressure_unit(u)))

    def span(self) -> tuple[float | None, float | None]:
        r = self.range or RangeModel()
        return r.min, r.max


def _kind(value: Any) -> str | None:
    kind = value.get("kind") if isinstance(value, dict) else getattr(value, "kind", None)
    return f"[{kind}]" if isinstance(kind, str) else None


# Tags carry '[..]' so yamlio drops them from error locations (they are not YAML keys).
ValveDevice = Annotated[
    Annotated[AsciiRelayDevice, Tag("[ascii_relay]")] | Annotated[SimDevice, Tag("[sim]")],
    Discriminator(_kind, custom_error_type="kind", custom_error_message="kind must be ascii_relay or sim"),
]
PressureDevice = Annotated[
    Annotated[AsciiGaugeDevice, Tag("[ascii_gauge]")] | Annotated[VisaMeterDevice, Tag("[visa_meter]")]
    | Annotated[ModbusDevice, Tag("[modbus]")] | Annotated[SimDevice, Tag("[sim]")],
    Discriminator(_kind, custom_error_type="kind",
                  custom_error_message="kind must be ascii_gauge, visa_meter, modbus or sim"),
]
ThermometerDevice = Annotated[
    Annotated[AsciiThermometerDevice, Tag("[ascii_thermometer]")] | Annotated[SimDevice, Tag("[sim]")],
    Discriminator(_kind, custom_error_type="kind",
                  custom_error_message="kind must be ascii_thermometer or sim"),
]


# -- layout and limits ------------------------------------------------------------------------------

class ValveRolesModel(Strict):
    inlet: str
    vent: str
    expansion: dict[str, str] = {}  # expansion-volume name -> valve name
    other: list[str] = []

    def build(self) -> ValveRoles:
        return ValveRoles(self.inlet, self.vent, dict(self.expansion), tuple(self.other))


class ChambersModel(Strict):
    cell: Volume
    expansion: dict[str, Volume] = {}

    def build(self) -> Chambers:
        return Chambers(self.cell, dict(self.expansion))


class InstrumentConfig(Strict):
    """One pycnometer: drivers per role, gas-path layout, interlock limits."""

    name: str
    valves: ValveDevice
    pressure: PressureDevice
    thermometer: ThermometerDevice | None = None
    barometer: PressureDevice | None = None
    supply: PressureDevice | None = None  # a gauge on the supply line, read before the inlet opens
    valve_roles: ValveRolesModel | None = None  # may be omitted when valves are simulated
    forbidden: list[list[str]] | None = None  # sets never open together; default [[inlet, vent]]
    chambers: ChambersModel | None = None
    limits: Limits | None = None
    sample_period: Seconds = 0.1
    gas: str = "helium"
    pressure_u: Pressure = 20.0
    temperature_u: Temperature = 0.05
    ambient_nominal: Pressure = STANDARD_ATMOSPHERE

    @field_validator("gas")
    @classmethod
    def _known_gas(cls, gas: str) -> str:
        try:
            get_gas(gas)
        except ValueError as exc:
            raise ValueError(str(exc)) from None
        return gas

    @property
    def pressure_is_gauge(self) -> bool:
        return getattr(self.pressure, "reference", "gauge") == "gauge"

    def forbidden_sets(self) -> list[frozenset[str]] | None:
        if self.forbidden is not None:
            return [frozenset(c) for c in self.forbidden]
        if self.valve_roles is not None:
            return [frozenset({self.valve_roles.inlet, self.valve_roles.vent})]
        return None

    def findings(self) -> tuple[list[tuple[yamlio.Loc, str]], list[tuple[yamlio.Loc, str]]]:
        """Cross-field checks: (errors, warnings), each a (YAML location, message)."""
        return _cross_check(self)


Finding = tuple[yamlio.Loc, str]


def _cross_check(cfg: InstrumentConfig) -> tuple[list[Finding], list[Finding]]:
    errors: list[Finding] = []
    warnings: list[Finding] = []
    sim_valves = isinstance(cfg.valves, SimDevice)
    if not sim_valves:
        for key in ("valve_roles", "chambers", "limits"):
            if getattr(cfg, key) is None:
                errors.append(((), f"missing key {key!r} (required unless valves are simulated)"))
    names = set(cfg.valves.valve_names()) if isinstance(cfg.valves, AsciiRelayDevice) else None
    roles = cfg.valve_roles
    if roles is not None and names is not None:
        for key in ("inlet", "vent"):
            if getattr(roles, key) not in names:
                errors.append((("valve_roles", key), f"unknown valve {getattr(roles, key)!r}; "
                               f"the board has {sorted(names)}"))
        for vol, valve in roles.expansion.items():
            if valve not in names:
                errors.append((("valve_roles", "expansion", vol), f"unknown valve {valve!r}"))
        for i, valve in enumerate(roles.other):
            if valve not in names:
                errors.append((("valve_roles", "other", i), f"unknown valve {valve!r}"))
        if roles.inlet == roles.vent:
            errors.append((("valve_roles", "vent"), "inlet and vent must be different valves"))
        if isinstance(cfg.valves, AsciiRelayDevice):
            if cfg.valves.valves.get(roles.inlet, ValveChannel(channel=1)).normally == "open":
                warnings.append((("valves", "valves", roles.inlet),
                                 "the inlet is normally open: power loss would fill the cell (use NC)"))
            if cfg.valves.valves.get(roles.vent, ValveChannel(channel=1)).normally == "closed":
                warnings.append((("valves", "valves", roles.vent),
                                 "the vent is normally closed: power loss would trap pressure (use NO)"))
    if cfg.forbidden is not None:
        for i, combo in enumerate(cfg.forbidden):
            if len(set(combo)) < 2:
                errors.append((("forbidden", i), "a forbidden combination needs two or more valves"))
            for j, valve in enumerate(combo):
                if names is not None and valve not in names:
                    errors.append((("forbidden", i, j), f"unknown valve {valve!r}"))
    if roles is not None:
        bad = violations(roles.build().safe_state(), cfg.forbidden_sets() or [])
        if bad:
            errors.append((("forbidden",), "the safe state (inlet closed, vent and expansions open) "
                           f"would violate {[sorted(c) for c in bad]}"))
    if roles is not None and cfg.chambers is not None:
        if set(roles.expansion) != set(cfg.chambers.expansion):
            errors.append((("chambers", "expansion"), f"expansion volumes {sorted(cfg.chambers.expansion)} "
                           f"do not match valve_roles.expansion {sorted(roles.expansion)}"))
        if cfg.chambers.cell <= 0 or any(v <= 0 for v in cfg.chambers.expansion.values()):
            errors.append((("chambers",), "volumes must be positive"))
    lim = cfg.limits
    if lim is not None:
        span = getattr(cfg.pressure, "span", None)
        if span is not None:
            lo, hi = span()
            offset = 0.0 if cfg.pressure_is_gauge else cfg.ambient_nominal
            if hi is None:
                warnings.append((("pressure",), "no transducer range given; cannot check that it covers "
                                 "the relief setting"))
            elif hi < lim.relief_setting + offset:
                warnings.append((("limits", "relief_setting"),
                                 f"the transducer range ends at {hi:.6g} Pa, below the relief setting "
                                 f"({lim.relief_setting + offset:.6g} Pa {'abs' if offset else 'gauge'}): "
                                 "an overpressure up to the relief would read OUT_OF_RANGE"))
            if lo is not None and hi is not None and lo >= hi:
                errors.append((("pressure", "range"), "range min must be below max"))
    sims = {d.config for d in (cfg.valves, cfg.pressure, cfg.thermometer, cfg.barometer, cfg.supply)
            if isinstance(d, SimDevice)}
    if len(sims) > 1:
        found = sorted(map(str, sims))
        errors.append(((), f"every sim role must use the same simulator config, got {found}"))
    return errors, warnings


# -- loading ----------------------------------------------------------------------------------------

def load_instrument_config(path: str | Path) -> InstrumentConfig:
    """Load and check an instrument file; ConfigError lists every problem with file:line:col.

    Warnings (a transducer that does not cover the relief setting, an NO inlet) are logged.
    Relative simulator config paths are resolved against the file's folder.
    """
    doc = yamlio.load_file(path)
    cfg = yamlio.validate(InstrumentConfig, doc)
    errors, warnings = cfg.findings()
    if errors:
        raise yamlio.ConfigError([doc.problem(loc, msg) for loc, msg in errors])
    for loc, msg in warnings:
        log.warning("%s (warning)", doc.problem(loc, msg))
    base = Path(path).parent
    updates: dict[str, Any] = {}
    for role in ("valves", "pressure", "thermometer", "barometer"):
        dev = getattr(cfg, role)
        if isinstance(dev, SimDevice) and dev.config and not Path(dev.config).is_absolute():
            updates[role] = dev.model_copy(update={"config": str(base / dev.config)})
    return cfg.model_copy(update=updates) if updates else cfg


# -- building ---------------------------------------------------------------------------------------

class _Opened:
    """Transports opened while building, shared by port, closed again if the build fails."""

    def __init__(self) -> None:
        self.serial: dict[str, SerialTransport] = {}
        self.devices: list[Any] = []

    def serial_for(self, link: SerialLink, name: str) -> Transport:
        if link.port not in self.serial:
            self.serial[link.port] = link.transport(name)
        return self.serial[link.port]

    def close_all(self) -> None:
        for dev in self.devices:
            try:
                dev.close()
            except Exception as exc:  # the build already failed; report the first error
                log.debug("closing %r after a failed build: %s", dev, exc)
        for t in self.serial.values():
            t.close()


def _sim_instrument(cfg: InstrumentConfig, sim_bench: Any, realtime: bool = False) -> Instrument:
    if sim_bench is not None:
        return sim_bench
    from pycnoctl.drivers.simulated import build_sim_instrument

    paths = {d.config for d in (cfg.valves, cfg.pressure, cfg.thermometer, cfg.barometer, cfg.supply)
             if isinstance(d, SimDevice)}
    return build_sim_instrument(next(iter(paths)) if paths else None, realtime=realtime)


def _pressure_device(dev: Any, role: str, opened: _Opened, clock: Clock, sim: Instrument | None) -> Any:
    if isinstance(dev, SimDevice):
        assert sim is not None
        return {"pressure": sim.pressure, "barometer": sim.barometer, "supply": sim.supply}[role]
    if isinstance(dev, AsciiGaugeDevice):
        return AsciiGauge(opened.serial_for(dev, role), fmt=dev.fmt(), name=role, clock=clock,
                          absolute=dev.reference == "absolute")
    if isinstance(dev, VisaMeterDevice):
        from pycnoctl.drivers.visa_meter import LoopScaling, VisaTransducerMeter

        t = VisaTransport(dev.resource, name=role, backend=dev.backend, timeout=dev.timeout)
        opened.devices.append(t)
        return VisaTransducerMeter(t, scaling=dev.scaling(LoopScaling), query=dev.query,
                                   setup=tuple(dev.setup), name=role, clock=clock)
    if isinstance(dev, ModbusDevice):
        from pycnoctl.drivers.modbus_gauge import ModbusGauge, RegisterMap

        r = dev.range or RangeModel()
        regmap = RegisterMap(address=dev.address, table=dev.table, datatype=dev.datatype,
                             word_order=dev.word_order, device_id=dev.device_id, gain=dev.gain,
                             offset=dev.offset, unit=dev.unit, range_min=r.min, range_max=r.max)
        if dev.link == "tcp":
            return ModbusGauge.tcp(str(dev.host), int(dev.port), regmap, timeout=dev.timeout, name=role,
                                   clock=clock)
        return ModbusGauge.rtu(str(dev.port), regmap, baudrate=dev.baudrate, timeout=dev.timeout,
                               name=role, clock=clock)
    raise TypeError(f"no driver for {type(dev).__name__}")


def build_instrument(cfg: InstrumentConfig, *, clock: Clock | None = None, sim_bench: Any = None,
                     realtime: bool = False) -> Instrument:
    """Open every device named in cfg and assemble the Instrument (valves behind the guard).

    sim_bench: an Instrument from drivers.simulated.build_sim_instrument whose drivers serve the
    roles of kind 'sim' (so tests can put fake byte-level devices on the same simulator).
    Without a clock, the simulator's clock is used when any role is simulated, else wall time.
    """
    errors, _ = cfg.findings()
    if errors:
        raise ValueError("; ".join(f"{'.'.join(map(str, loc)) or '<top>'}: {m}" for loc, m in errors))
    roles_devices = (cfg.valves, cfg.pressure, cfg.thermometer, cfg.barometer, cfg.supply)
    uses_sim = any(isinstance(d, SimDevice) for d in roles_devices)
    sim = _sim_instrument(cfg, sim_bench, realtime) if uses_sim else None
    clk = clock or (sim.clock if sim is not None else WallClock())
    opened = _Opened()
    try:
        if isinstance(cfg.valves, SimDevice):
            assert sim is not None
            bank: ValveBank = getattr(sim.valves, "inner", sim.valves)
            roles = cfg.valve_roles.build() if cfg.valve_roles else sim.roles
        else:
            assert cfg.valve_roles is not None
            dev = cfg.valves
            channels = {n: Channel(v.channel, v.normally == "open") for n, v in dev.valves.items()}
            bank = AsciiRelayBoard(opened.serial_for(dev, "valves"), channels, commands=dev.commands.build(),
                                   name="valves", watchdog=dev.watchdog)
            roles = cfg.valve_roles.build()
        unknown = ({roles.inlet, roles.vent} | set(roles.expansion.values())) - set(bank.valve_names)
        if unknown:
            raise ValueError(f"valve_roles name valves the bank does not have: {sorted(unknown)}")
        guarded = GuardedValveBank(bank, cfg.forbidden_sets(), roles=roles)
        pressure: PressureSensor = _pressure_device(cfg.pressure, "pressure", opened, clk, sim)
        barometer = _pressure_device(cfg.barometer, "barometer", opened, clk, sim) if cfg.barometer else None
        supply = _pressure_device(cfg.supply, "supply", opened, clk, sim) if cfg.supply else None
        if cfg.supply is not None and supply is None:  # a supply check configured must not vanish
            raise ValueError("supply: {kind: sim} needs a supply gauge in the simulator config "
                             "(instruments: {supply_gauge: true})")
        thermometer: Thermometer | None = None
        if isinstance(cfg.thermometer, SimDevice):
            thermometer = sim.thermometer if sim is not None else None
        elif isinstance(cfg.thermometer, AsciiThermometerDevice):
            d = cfg.thermometer
            fmt = GaugeFormat(query=d.query, regex=d.regex, unit=d.unit, gain=d.gain, offset=d.offset)
            thermometer = AsciiGauge(opened.serial_for(d, "thermometer"), fmt=fmt, name="thermometer",
                                     clock=clk, quantity="temperature")
        chambers = cfg.chambers.build() if cfg.chambers else (sim.chambers if sim else None)
        limits = cfg.limits if cfg.limits else (sim.limits if sim else None)
        if chambers is None or limits is None:
            raise ValueError("chambers and limits are required")
    except BaseException:
        opened.close_all()
        raise
    extras: dict[str, object] = {"config": cfg}
    if sim is not None:  # the simulator's own extras (extras['sim'] is its bench), and its instrument
        extras.update(sim.extras)
        extras["sim_instrument"] = sim
    return Instrument(
        name=cfg.name, valves=guarded, pressure=pressure, clock=clk, roles=roles, chambers=chambers,
        limits=limits, pressure_is_gauge=cfg.pressure_is_gauge if not isinstance(cfg.pressure, SimDevice)
        else (sim.pressure_is_gauge if sim else True),
        thermometer=thermometer, barometer=barometer, supply=supply, sample_period=cfg.sample_period,
        pressure_u=cfg.pressure_u, temperature_u=cfg.temperature_u, ambient_nominal=cfg.ambient_nominal,
        gas=cfg.gas, extras=extras)


def reconnect_instrument(inst: Instrument) -> dict[str, str | None]:
    """Operator reset after a communication fault (see Instrument.reconnect); never raises."""
    return inst.reconnect()
