"""In-process drivers over the simulator bench, and the simulated Instrument.

Why: every engine and driver test, and a user trying a sequence before touching hardware, needs
an Instrument whose devices behave like real ones, failures included.  These drivers implement
the role protocols of drivers/base.py and translate the bench's sensor modes into validities.

What a real board can and cannot tell is kept: ``read_back`` reports the *commanded* relay
states (a relay board knows its coils, not whether a valve seat moved), so a stuck valve is NOT
visible there - the engine must infer it from the pressure.  A frozen transducer returns the same
value as VALID, as a real one would; detecting it is the engine's job.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any, Literal

from pycnoctl.controller.domain.devices import DeviceDisconnected, DeviceError, Reading, Validity
from pycnoctl.controller.domain.gaspath import Chambers, Limits, ValveRoles
from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.drivers import registry
from pycnoctl.drivers.fields import Strict
from pycnoctl.drivers.guarded import GuardedValveBank
from pycnoctl.drivers.instrument import Instrument
from pycnoctl.sim.bench import SensorSample, SimBench
from pycnoctl.sim.clock import SimClock
from pycnoctl.sim.config import DEFAULT_CONFIG, SimConfig, load_sim_config

_VALIDITY = {
    "ok": Validity.VALID,
    "frozen": Validity.VALID,  # indistinguishable from a steady reading
    "silent": Validity.TIMEOUT,
    "garbled": Validity.GARBLED,
    "nan": Validity.NAN,
    "disconnected": Validity.DISCONNECTED,
    "out_of_range": Validity.OUT_OF_RANGE,
}


def sample_to_reading(sample: SensorSample, unit: str, device: str) -> Reading:
    """Map a bench sample to a Reading with the validity a real driver would give it."""
    validity = _VALIDITY.get(sample.mode, Validity.GARBLED)
    if validity is Validity.VALID and math.isfinite(sample.value):
        return Reading(sample.value, unit, sample.t)
    return Reading.invalid(unit, sample.t, validity, f"{device}: {sample.mode}")


class SimValveBank:
    """The simulated relay board.  Raises DeviceDisconnected while its board is unplugged."""

    name = "valves"

    def __init__(self, bench: SimBench) -> None:
        self._bench = bench
        self._closed = False

    @property
    def valve_names(self) -> tuple[str, ...]:
        return self._bench.valve_names

    def _check(self, command: str) -> None:
        if self._closed:
            raise DeviceDisconnected(self.name, "driver is closed", command)
        if not self._bench.connected("valves"):
            raise DeviceDisconnected(self.name, "relay board not responding (unplugged)", command)

    def set_valves(self, states: Mapping[str, bool]) -> None:
        unknown = [n for n in states if n not in self._bench.valve_names]
        if unknown:
            raise DeviceError(self.name, f"no such valve(s): {', '.join(map(repr, unknown))}")
        self._check(f"set {dict(states)}")
        self._bench.set_valves(states)

    def commanded(self) -> dict[str, bool]:
        return self._bench.commanded()

    def read_back(self) -> dict[str, bool] | None:
        """The relay states the board reports: the commanded ones (a stuck seat is invisible)."""
        self._check("read back")
        return self._bench.commanded()

    def close(self) -> None:
        self._closed = True


class _SimSensor:
    unit = ""
    device = ""

    def __init__(self, bench: SimBench, name: str | None = None) -> None:
        self._bench = bench
        self.name = name or self.device
        self._closed = False

    def _sample(self) -> SensorSample:  # pragma: no cover - overridden
        raise NotImplementedError

    def read(self) -> Reading:
        if self._closed:
            return Reading.invalid(self.unit, self._bench.clock.now(), Validity.DISCONNECTED, "closed")
        return sample_to_reading(self._sample(), self.unit, self.name)

    def close(self) -> None:
        self._closed = True


class SimPressureSensor(_SimSensor):
    """The transducer: gauge or absolute (see ``is_gauge``), Pa."""

    unit = "Pa"
    device = "pressure"

    @property
    def is_gauge(self) -> bool:
        return self._bench.pressure_is_gauge

    def _sample(self) -> SensorSample:
        return self._bench.read_pressure()


class SimThermometer(_SimSensor):
    unit = "K"
    device = "thermometer"

    def _sample(self) -> SensorSample:
        return self._bench.read_thermometer()


class SimBarometer(_SimSensor):
    unit = "Pa"
    device = "barometer"

    def _sample(self) -> SensorSample:
        return self._bench.read_barometer()


class SimSupplyGauge(_SimSensor):
    """The supply line's gauge: what the regulator delivers, Pa above ambient (a failed one rising)."""

    unit = "Pa"
    device = "supply"

    def _sample(self) -> SensorSample:
        t = self._bench.sync()
        return SensorSample(t, self._bench.supply_gauge(t), "ok")


def _roles(cfg: SimConfig) -> ValveRoles:
    inlet = next(n for n, v in cfg.valves.items() if v.role == "inlet")
    vent = next(n for n, v in cfg.valves.items() if v.role == "vent")
    expansion = {vol: valve for valve, vol in cfg.expansion_volumes().items()}
    other = tuple(n for n, v in cfg.valves.items() if v.role == "other")
    return ValveRoles(inlet=inlet, vent=vent, expansion=expansion, other=other)


def _cell_side_volume(cfg: SimConfig) -> float:
    """The cell plus every volume joined to it by an always-open link (its dead volume)."""
    seen = {cfg.cell}
    grew = True
    while grew:
        grew = False
        for lk in cfg.links:
            a, b = lk.between
            if (a in seen) != (b in seen):
                seen |= {a, b}
                grew = True
    return sum(cfg.volumes[n].volume for n in seen)


#: the relative standard uncertainty a simulated build states for its nominal volumes unless its config
#: says otherwise: a volume from drawings of machined parts and tubing, known to about 0.5 % (from memory)
SIM_NOMINAL_U = 0.005


def _chambers(cfg: SimConfig) -> Chambers:
    cell = _cell_side_volume(cfg)
    expansion = {vol: cfg.volumes[vol].volume for vol in cfg.expansion_volumes().values()}
    nom = cfg.nominal
    if nom is not None:
        if nom.cell is not None:
            cell = nom.cell
        expansion.update(nom.expansion)
    return Chambers(cell=cell, expansion=expansion, nominal_u=nom.u if nom is not None else SIM_NOMINAL_U)


def sim_limits(cfg: SimConfig) -> Limits:
    """Limits of the derived instrument (see SimConfig.instrument_limits)."""
    return cfg.instrument_limits()


def sim_config_limits(config: str | Path | None) -> tuple[Limits, str, bool] | None:
    """(the interlock limits a simulator config file gives the instrument built on it, the file read,
    whether it sets stale_after itself), or None where the file does not load (its build then says why):
    what an instrument config with simulated valves and no limits of its own runs under."""
    path = DEFAULT_CONFIG if config is None else Path(config)
    try:
        cfg = load_sim_config(path)
    except (ConfigError, OSError, ValueError):
        return None
    return sim_limits(cfg), str(path), "stale_after" in cfg.limits


def _paced_limits(limits: Limits, realtime: bool, speed: float) -> Limits:
    """A real-time simulator sped up S times turns any pause of the host (a slow disk flush at the
    start of a run, say) into S times as much instrument time; the stale-reading limit is widened to
    cover a half-second pause of the host, so the demo does not trip on its own bookkeeping."""
    if not realtime or speed <= 1.0:
        return limits
    return limits.model_copy(update={"stale_after": max(limits.stale_after, 0.5 * speed)})


def _systematic_u(p: Any) -> float:
    """Pa: what the simulated transducer's datasheet would state as its systematic u at a reading.

    Its bow (largest deviation d at mid-range) as a rectangular bound, d / sqrt(3); and its resolution
    q where its noise is too small to dither it (sigma < q / 2): a steady pressure then reads the same
    rounded value every sample, an error up to q / 2 that no window averages down, u = q / sqrt(12).
    Found by a sweep: a noise-free gauge with a 500 Pa step measured 0.76 % off with a P1 u of 0.04 Pa."""
    bow = p.nonlinearity * (p.full_scale - p.range_min) / math.sqrt(3.0)
    steps = p.resolution / math.sqrt(12.0) if p.noise < p.resolution / 2.0 else 0.0
    return math.hypot(bow, steps)


def build_sim_instrument(
    config: SimConfig | str | Path | None = None, *, realtime: bool = False, speed: float = 1.0,
    seed: int | None = None,
) -> Instrument:
    """An Instrument over a fresh simulator bench; ``extras['sim']`` is the bench (the truth).

    ``seed`` pins the noise realisation (else the config's, else a fresh one: see sim.bench.fresh_seed)."""
    cfg = config if isinstance(config, SimConfig) else load_sim_config(config)
    if seed is not None:
        cfg = cfg.model_copy(update={"seed": int(seed)})
    bench = SimBench(cfg, SimClock(realtime=realtime, speed=speed))
    ins = cfg.instruments
    roles = _roles(cfg)
    return Instrument(
        name=cfg.name,
        valves=GuardedValveBank(SimValveBank(bench), roles=roles),
        pressure=SimPressureSensor(bench),
        clock=bench.clock,
        roles=roles,
        chambers=_chambers(cfg),
        limits=_paced_limits(sim_limits(cfg), realtime, speed),
        pressure_is_gauge=bench.pressure_is_gauge,
        thermometer=SimThermometer(bench) if ins.thermometer is not None else None,
        barometer=SimBarometer(bench) if ins.barometer is not None else None,
        supply=SimSupplyGauge(bench) if ins.supply_gauge else None,
        sample_period=cfg.sample_period,
        pressure_u=max(ins.pressure.noise, ins.pressure.resolution / math.sqrt(12.0), 1.0),
        # what the simulated transducer's datasheet would state: its bow (largest deviation d at mid-range)
        # as a rectangular bound, u = d / sqrt(3); a linear one states 0 and its noise is all random
        pressure_u_linearity=_systematic_u(ins.pressure),
        temperature_u=max(ins.thermometer.noise if ins.thermometer else 0.05, 0.01),
        barometer_u=max(ins.barometer.noise, ins.barometer.resolution / math.sqrt(12.0), 0.1)
        if ins.barometer is not None else 5.0,
        ambient_nominal=cfg.lab.pressure,
        gas=cfg.gas,
        extras={"sim": bench},
        identity=sim_identity(cfg),
        simulated=True,
    )


def sim_identity(cfg: SimConfig) -> str:
    """'sim:NAME:DIGEST': the digest covers the simulated gas path (volumes, valves, links, cell, the
    volumes the instrument believes in), so a calibration made on one simulated build is refused on
    another of the same name; noise, seed, faults and timing do not enter it."""
    data = cfg.model_dump(mode="json", include={"volumes", "valves", "links", "cell", "nominal"})
    digest = hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()[:10]
    return f"sim:{cfg.name}:{digest}"


# -- config ---------------------------------------------------------------------------------------

class SimDevice(Strict):
    """A role served by the simulator; every simulated role shares one bench (one config)."""

    kind: Literal["sim"]
    config: str | None = None  # simulator config file; None for the simulator's default


SIM = "sim"  # BuildContext.shared key of the simulated Instrument the loader made for the sim roles


def build_sim_device(dev: SimDevice, ctx: registry.BuildContext) -> Any:
    """The simulated Instrument's driver for the role (valves without its guard: the loader adds one)."""
    sim: Instrument = ctx.shared[SIM]
    if ctx.role == "valves":
        return getattr(sim.valves, "inner", sim.valves)
    return getattr(sim, ctx.role, None)


registry.register("sim", (registry.VALVES, registry.PRESSURE, registry.TEMPERATURE), SimDevice, build_sim_device)
