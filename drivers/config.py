"""The instrument config: which driver serves each role, and how the gas path is laid out.

A new relay board or transducer should be a config entry, not code: the relay board's command
templates, the gauge's query and reply regex, scaling and units all live here.  Loading is
strict (unknown keys, bad units, impossible limits are errors with file:line:col) because a
mistake here opens the wrong valve.  build_instrument() turns a config into the Instrument the
engine runs, with the valve bank always behind a GuardedValveBank.

Which kinds a role accepts comes from the driver registry (drivers/registry.py): each driver
module owns its config model and its builder, so nothing here names a hardware driver.  The
simulator is the one kind known by name, because it stands in for the whole instrument (one
bench behind every simulated role, its clock, its gas path when the config gives none).
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Annotated, Any

from pydantic import AfterValidator, field_validator

from pycnoctl.controller.domain import yamlio
from pycnoctl.controller.domain.clock import WallClock
from pycnoctl.controller.domain.devices import PressureSensor, Thermometer, ValveBank
from pycnoctl.controller.domain.gas import get_gas
from pycnoctl.controller.domain.gaspath import (
    Chambers,
    Limits,
    ValveRoles,
    chamber_problem,
    sample_period_problem,
    stale_problem,
)
from pycnoctl.controller.domain.text import plain
from pycnoctl.controller.domain.units import lab_pressure_problem
from pycnoctl.drivers import registry
from pycnoctl.drivers.fields import Pressure, PressureRate, Seconds, Strict, Temperature
from pycnoctl.drivers.guarded import GuardedValveBank, violations
from pycnoctl.drivers.instrument import Instrument
from pycnoctl.drivers.simulated import SIM, SimDevice, sim_config_limits

log = logging.getLogger(__name__)

STANDARD_ATMOSPHERE = 101325.0  # Pa (scipy.constants.atm); ambient assumed when comparing gauge/absolute

ValveDevice = registry.device_type(registry.VALVES)
PressureDevice = registry.device_type(registry.PRESSURE)
ThermometerDevice = registry.device_type(registry.TEMPERATURE)
DEVICE_ROLES = ("valves", "pressure", "thermometer", "barometer", "supply")


class InstrumentConfig(Strict):
    """One pycnometer: drivers per role, gas-path layout, interlock limits."""

    name: Annotated[str, AfterValidator(plain)]
    # a stable identity for this pycnometer (a serial number, an inventory tag); default: the name.
    # Calibrations are bound to it: give every build its own, and keep it when the config is edited.
    instrument_id: Annotated[str, AfterValidator(plain)] | None = None
    valves: ValveDevice
    pressure: PressureDevice
    thermometer: ThermometerDevice | None = None
    barometer: PressureDevice | None = None
    supply: PressureDevice | None = None  # a gauge on the supply line, read before the inlet opens
    valve_roles: ValveRoles | None = None  # may be omitted when valves are simulated
    forbidden: list[list[str]] | None = None  # sets never open together; default [[inlet, vent]]
    chambers: Chambers | None = None
    limits: Limits | None = None
    sample_period: Seconds = 0.1
    gas: str = "helium"
    pressure_u: Pressure = 20.0
    pressure_u_linearity: Pressure | None = None
    temperature_u: Temperature = 0.05
    barometer_u: Pressure = 5.0
    ambient_drift_rate: PressureRate = 100.0 / 3600.0
    ambient_nominal: Pressure = STANDARD_ATMOSPHERE

    @field_validator("ambient_nominal", mode="wrap")
    @classmethod
    def _a_lab_pressure(cls, v: Any, parse: Any) -> float:
        """The air pressure of the lab: a gauge transducer's readings are referred to it where no
        barometer reads it, so a wrong unit would shift every absolute pressure."""
        out = float(parse(v))
        problem = lab_pressure_problem(v, out)
        if problem is not None:
            raise ValueError(problem)
        return out

    @field_validator("gas")
    @classmethod
    def _known_gas(cls, gas: str) -> str:
        get_gas(gas)  # ValueError names the known gases
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
    valve_names = getattr(cfg.valves, "valve_names", None)  # a board that declares its valves
    names = set(valve_names()) if valve_names is not None else None
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
        normally_open = getattr(cfg.valves, "normally_open", None)  # a board that knows its valve types
        if normally_open is not None:
            if normally_open(roles.inlet) is True:
                warnings.append((("valves", "valves", roles.inlet),
                                 "the inlet is normally open: power loss would fill the cell (use NC)"))
            if normally_open(roles.vent) is False:
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
        bad = violations(roles.safe_state(), cfg.forbidden_sets() or [])
        if bad:
            errors.append((("forbidden",), "the safe state (inlet closed, vent and expansions open) "
                           f"would violate {[sorted(c) for c in bad]}"))
    if roles is not None and cfg.chambers is not None:
        if set(roles.expansion) != set(cfg.chambers.expansion):
            errors.append((("chambers", "expansion"), f"expansion volumes {sorted(cfg.chambers.expansion)} "
                           f"do not match valve_roles.expansion {sorted(roles.expansion)}"))
        for loc, v in [(("chambers", "cell"), cfg.chambers.cell),
                       *((("chambers", "expansion", name), v) for name, v in cfg.chambers.expansion.items())]:
            problem = chamber_problem(".".join(loc), v)
            if problem is not None:  # 1e30 cm^3 passed once (found by a sweep)
                errors.append((loc, problem))
    short = sample_period_problem(cfg.sample_period)
    if short is not None:
        errors.append((("sample_period",), short))
    lim = cfg.limits
    if lim is not None:
        stale = stale_problem(cfg.sample_period, lim.stale_after,
                              note="" if "stale_after" in lim.model_fields_set else "its default")
        if stale is not None:  # at the key the file gives (the sample period where both are given)
            given = "sample_period" in cfg.model_fields_set or "stale_after" not in lim.model_fields_set
            errors.append((("sample_period",) if given else ("limits", "stale_after"), stale))
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
    sims = {d.config for d in (getattr(cfg, r) for r in DEVICE_ROLES) if isinstance(d, SimDevice)}
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
    for role in DEVICE_ROLES:
        dev = getattr(cfg, role)
        if isinstance(dev, SimDevice) and dev.config and not Path(dev.config).is_absolute():
            updates[role] = dev.model_copy(update={"config": str(base / dev.config)})
    cfg = cfg.model_copy(update=updates) if updates else cfg
    stale = _simulated_stale(cfg)
    if stale is not None:
        raise yamlio.ConfigError([doc.problem(("sample_period",), stale)])
    return cfg


def _simulated_stale(cfg: InstrumentConfig) -> str | None:
    """Where the limits come from the simulator config (none here, simulated valves), its stale-reading
    limit against this file's sample period, which the built instrument reads at (build_instrument).
    A simulator config that does not load is left to the build, which says why."""
    if cfg.limits is not None or not isinstance(cfg.valves, SimDevice):
        return None
    found = sim_config_limits(cfg.valves.config)
    if found is None:
        return None
    limits, source, given = found
    return stale_problem(cfg.sample_period, limits.stale_after,
                         note=f"{'set in' if given else 'the default of'} the simulator config {source}")


# -- building ---------------------------------------------------------------------------------------

def _sim_instrument(cfg: InstrumentConfig, sim_bench: Any, realtime: bool = False) -> Instrument:
    if sim_bench is not None:
        return sim_bench
    from pycnoctl.drivers.simulated import build_sim_instrument

    paths = {d.config for d in (getattr(cfg, r) for r in DEVICE_ROLES) if isinstance(d, SimDevice)}
    return build_sim_instrument(next(iter(paths)) if paths else None, realtime=realtime)


def _close_all(opened: list[Any]) -> None:
    """Close what a failed build opened, newest first; the build's own error is the one reported."""
    for dev in reversed(opened):
        try:
            dev.close()
        except Exception as exc:  # the build already failed; report the first error
            log.debug("closing %r after a failed build: %s", dev, exc)


def build_instrument(cfg: InstrumentConfig, *, clock: Any = None, sim_bench: Any = None,
                     realtime: bool = False) -> Instrument:
    """Open every device named in cfg and assemble the Instrument (valves behind the guard).

    Each role's device is made by the builder its kind registered (drivers/registry.py).
    sim_bench: an Instrument from drivers.simulated.build_sim_instrument whose drivers serve the
    roles of kind 'sim' (so tests can put fake byte-level devices on the same simulator).
    Without a clock, the simulator's clock is used when any role is simulated, else wall time.
    """
    errors, _ = cfg.findings()
    if errors:
        raise ValueError("; ".join(f"{'.'.join(map(str, loc)) or '<top>'}: {m}" for loc, m in errors))
    uses_sim = any(isinstance(getattr(cfg, r), SimDevice) for r in DEVICE_ROLES)
    sim = _sim_instrument(cfg, sim_bench, realtime) if uses_sim else None
    clk = clock or (sim.clock if sim is not None else WallClock())
    shared: dict[str, Any] = {SIM: sim} if sim is not None else {}
    opened: list[Any] = []

    def build(role: str) -> Any:
        dev = getattr(cfg, role)
        if dev is None:
            return None
        ctx = registry.BuildContext(role=role, clock=clk, shared=shared, opened=opened)
        return registry.lookup(dev).build(dev, ctx)

    try:
        bank: ValveBank = build("valves")
        if cfg.valve_roles is not None:
            roles = cfg.valve_roles
        else:
            assert sim is not None  # findings() requires valve_roles unless the valves are simulated
            roles = sim.roles
        unknown = ({roles.inlet, roles.vent} | set(roles.expansion.values())) - set(bank.valve_names)
        if unknown:
            raise ValueError(f"valve_roles name valves the bank does not have: {sorted(unknown)}")
        guarded = GuardedValveBank(bank, cfg.forbidden_sets(), roles=roles)
        pressure: PressureSensor = build("pressure")
        barometer = build("barometer")
        supply = build("supply")
        if cfg.supply is not None and supply is None:  # a supply check configured must not vanish
            raise ValueError("supply: {kind: sim} needs a supply gauge in the simulator config "
                             "(instruments: {supply_gauge: true})")
        thermometer: Thermometer | None = build("thermometer")
        chambers = cfg.chambers if cfg.chambers else (sim.chambers if sim else None)
        limits = cfg.limits if cfg.limits else (sim.limits if sim else None)
        if chambers is None or limits is None:
            raise ValueError("chambers and limits are required")
    except BaseException:
        _close_all(opened)
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
        pressure_u=cfg.pressure_u,
        pressure_u_linearity=cfg.pressure_u_linearity, temperature_u=cfg.temperature_u,
        barometer_u=cfg.barometer_u, ambient_drift_rate=cfg.ambient_drift_rate,
        ambient_nominal=cfg.ambient_nominal,
        gas=cfg.gas, extras=extras,
        # a simulated pressure reading makes the whole result simulated: it carries the simulator's identity
        identity=(sim.identity if sim is not None and isinstance(cfg.pressure, SimDevice)
                  else cfg.instrument_id or cfg.name),
        simulated=sim is not None and isinstance(cfg.pressure, SimDevice))


def reconnect_instrument(inst: Instrument) -> dict[str, str | None]:
    """Operator reset after a communication fault (see Instrument.reconnect); never raises."""
    return inst.reconnect()
