"""The assembled simulated instrument: gas network, lab, sensors, faults and clock.

Why lazy physics: nothing runs in the background.  Before every read or valve change the bench
advances the physics to ``clock.now()``, so a simulated clock (sleep = jump) and a real-time clock
share the code.  Steps are adaptive and may reach past ``now``: reads in between follow a parabola
through the last three step ends (the step controller keeps its error within ``solver.interp_tol``
Pa), and a valve change inside a step rolls the step back and redoes it up to the change.  So a settled
system costs a step every ``solver.max_step`` seconds however often it is read.

Thread-safe: one re-entrant lock guards all state, so byte-level fake devices may read from other
threads.
"""

from __future__ import annotations

import math
import operator
import os
import secrets
import threading
from collections.abc import Mapping
from pathlib import Path
from typing import NamedTuple

import numpy as np

from pycnoctl.controller.domain.gas import get_gas
from pycnoctl.sim.clock import SimClock
from pycnoctl.sim.config import DEVICES, Fault, SimConfig, load_sim_config
from pycnoctl.sim.faults import FaultSchedule, FaultState
from pycnoctl.sim.physics import GasNetwork, Link, Node
from pycnoctl.sim.sensors import SensorModel

SUPPLY, AMBIENT = 0, 1



#: environment variable that pins the seed of every simulator whose config gives none (the test suite
#: sets it, so its figures do not change from run to run; nobody else needs it: use --seed)
SEED_ENV = "PYCNOCTL_SIM_SEED"


def fresh_seed() -> int:
    """A new noise realisation for each simulated instrument, unless the environment pins one.

    Why: a simulator that gives bit-identical readings run after run makes every repeatability figure
    measured on it zero; the seed actually used is recorded with each run, so any run can be replayed."""
    pinned = os.environ.get(SEED_ENV)
    return int(pinned) if pinned else secrets.randbits(32)

class SensorSample(NamedTuple):
    """What a sensor delivers: time, value (NaN if none) and the mode it is in.

    mode: 'ok', 'frozen' (a stuck but plausible value), 'silent', 'garbled', 'nan', 'disconnected',
    'out_of_range' (output at a saturation rail).  A named tuple: one is made on every read.
    """

    t: float
    value: float
    mode: str = "ok"


class UnknownValve(KeyError):
    """A valve name the simulated board does not have."""


class SimBench:
    """One simulated pycnometer.  All pressures absolute Pa unless a name says gauge."""

    def __init__(self, config: SimConfig | str | Path | None = None, clock: SimClock | None = None,
                 *, realtime: bool = False) -> None:
        if not isinstance(config, SimConfig):
            config = load_sim_config(config)
        self.config = cfg = config
        self.clock = clock if clock is not None else SimClock(realtime=realtime)
        self.gas = get_gas(cfg.gas)
        self._lock = threading.RLock()
        self._t_start = self.clock.now()
        self._temp_step = 0.0
        self._amb_step = 0.0
        self._reg_fail: tuple[float, float] | None = None  # (since, rate)
        self._boundary: tuple[float, float, float] | None = None  # (lab K, ambient Pa, supply Pa) last set
        self._update_static()
        self._build_network()
        self._build_sensors()
        self.schedule = FaultSchedule(cfg.faults)
        self.events: list[tuple[float, str, str]] = []
        self._connected = dict.fromkeys(DEVICES, True)
        self._p_mode = "ok"
        self._frozen: float | None = None
        self._last_p: float | None = None
        self._stuck: dict[str, bool] = {}
        self._closing: dict[str, float] = {}  # valve -> when its closing stroke ends (close_time)
        self._leak_override: dict[str, float] = {}
        self._commanded = {v: v in cfg.initial_open for v in cfg.valves}
        self._openings = dict.fromkeys(cfg.valves, 0)
        t = self._t_start
        self._set_boundary(t)
        self.net.set_walls(self.lab_temperature(t))
        for i in self.net._var:
            self.net.init_node(i, self.ambient_pressure(t), self.lab_temperature(t))
        self._apply_valves()
        self._t0 = self._t1 = t
        self._P0, self._T0 = list(self.net.P), list(self.net.T)
        self._P1, self._T1 = self._P0, self._T0
        self._snap = self.net.snapshot()
        self._reset_control()
        self._handle_due(t)

    # ------------------------------------------------------------------ construction
    def _build_network(self) -> None:
        cfg = self.config
        nodes = [Node("supply", 1.0, fixed=True), Node("ambient", 1.0, fixed=True)]
        for name, v in cfg.volumes.items():
            vol = v.volume
            if name == cfg.cell:
                vol -= cfg.sample.solid_volume + cfg.sample.pore_volume
            nodes.append(Node(name, vol, v.thermal_tau))
        idx = {nd.name: i for i, nd in enumerate(nodes)}
        links: list[Link] = []
        self._valve_link: dict[str, int] = {}
        for name, v in cfg.valves.items():
            a, b = (idx[x] for x in v.between)
            self._valve_link[name] = len(links)
            links.append(Link(name, a, b, cda=v.cd * math.pi * v.diameter**2 / 4.0, conductance=v.leak))
        for k, lk in enumerate(cfg.links):
            a, b = (idx[x] for x in lk.between)
            links.append(Link(f"link{k}", a, b, cda=lk.cd * math.pi * lk.diameter**2 / 4.0, open=True))
        s = cfg.sample
        self.pore_node: str | None = None
        if s.pore_volume > 0.0:
            self.pore_node = f"{cfg.cell}.pores"
            nodes.append(Node(self.pore_node, s.pore_volume, s.pore_thermal_tau, hidden=True))
            # pore pressure relaxes to a steady cell pressure with time constant pore_tau:
            # dn_p/dt = C dp/(R T) with n_p = p V_p/(R T)  ->  C = V_p / pore_tau
            links.append(Link("pores", idx[cfg.cell], len(nodes) - 1, conductance=s.pore_volume / s.pore_tau))
        if cfg.relief is not None:
            r = cfg.relief
            links.append(Link("relief", idx[r.node], AMBIENT, relief_cda=r.cd * math.pi * r.diameter**2 / 4.0,
                              relief_set=r.set_pressure,
                              relief_reseat=r.reseat if r.reseat is not None else 0.95 * r.set_pressure))
        sv = cfg.solver
        self.net = GasNetwork(self.gas, nodes, links, rel_moles=sv.rel_moles, coupling=sv.coupling,
                              thermal_tol=sv.thermal_tol)
        self.node_index = self.net.index

    def _build_sensors(self) -> None:
        cfg = self.config.instruments
        self.seed = fresh_seed() if self.config.seed is None else int(self.config.seed)
        seeds = np.random.SeedSequence(self.seed).spawn(3)
        p = cfg.pressure
        span = p.full_scale - p.range_min
        self.p_low, self.p_high = p.range_min - 0.05 * span, p.full_scale + 0.05 * span
        self.pressure_is_gauge = p.kind == "gauge"
        self._nl, self._nl_lo, self._nl_span = p.nonlinearity, p.range_min, span
        self._p_node = self.node_index[p.node]
        self.p_sensor = SensorModel(noise=p.noise, zero_offset=p.zero_offset, resolution=p.resolution,
                                    update_rate=p.update_rate, lag=p.lag, low=self.p_low,
                                    high=self.p_high, rng=np.random.default_rng(seeds[0]))
        th = cfg.thermometer
        self.t_sensor = None if th is None else SensorModel(
            noise=th.noise, zero_offset=th.zero_offset, resolution=th.resolution,
            update_rate=th.update_rate, lag=th.lag, rng=np.random.default_rng(seeds[1]))
        b = cfg.barometer
        self.b_sensor = None if b is None else SensorModel(
            noise=b.noise, zero_offset=b.zero_offset, resolution=b.resolution,
            update_rate=b.update_rate, lag=b.lag, rng=np.random.default_rng(seeds[2]))

    # ------------------------------------------------------------------ lab and supply
    def lab_temperature(self, t: float) -> float:
        """Wall and lab temperature at time t, K."""
        lab = self.config.lab
        dt = t - self._t_start
        out = lab.temperature + lab.temperature_drift * dt + self._temp_step
        w = lab.temperature_wave
        if w is not None and w.amplitude:
            out += w.amplitude * math.sin(2.0 * math.pi * dt / w.period)
        return out

    def ambient_pressure(self, t: float | None = None) -> float:
        """Lab (ambient) pressure at time t (default now), Pa absolute."""
        if t is None:
            t = self.clock.now()
        lab = self.config.lab
        dt = t - self._t_start
        out = lab.pressure + lab.pressure_drift * dt + self._amb_step
        w = lab.pressure_wave
        if w is not None and w.amplitude:
            out += w.amplitude * math.sin(2.0 * math.pi * dt / w.period)
        return out

    def supply_gauge(self, t: float) -> float:
        """Gauge pressure the regulator delivers at time t (rising if it has failed)."""
        sup = self.config.supply
        if self._reg_fail is None:
            return sup.set_pressure
        since, rate = self._reg_fail
        ceiling = max(sup.cylinder_pressure, sup.set_pressure)
        return min(sup.set_pressure + rate * max(t - since, 0.0), ceiling)

    def _update_static(self) -> None:
        """Whether the boundary (lab temperature, ambient and supply pressure) stays put between
        faults: then a step need not work it out at its middle and end."""
        lab = self.config.lab
        self._static = (lab.temperature_drift == 0.0 and lab.pressure_drift == 0.0
                        and (lab.temperature_wave is None or not lab.temperature_wave.amplitude)
                        and (lab.pressure_wave is None or not lab.pressure_wave.amplitude)
                        and self._reg_fail is None)

    def _set_boundary(self, t: float) -> None:
        tl = self.lab_temperature(t)
        pa = self.ambient_pressure(t)
        ps = pa + self.supply_gauge(t)
        if (tl, pa, ps) == self._boundary:
            return  # nothing moved since the last call (a lab without drift): twice every step
        self._boundary = (tl, pa, ps)
        net = self.net
        ts = self.config.supply.temperature
        net.set_fixed(SUPPLY, ps, tl if ts is None else ts)
        net.set_fixed(AMBIENT, pa, tl)
        net.set_walls(tl)

    # ------------------------------------------------------------------ integration
    def _reset_control(self) -> None:
        self._h_next = self.config.solver.first_step
        self._slopes: list[float] | None = None
        self._curv: list[float] | None = None
        self._h_prev = self._h_prev2 = 0.0
        # the history point of the step in hand (time, pressures, temperatures): None right after
        # a cut, when the parabola would reach back across a kink
        self._tm = 0.0
        self._Pm: list[float] | None = None
        self._Tm: list[float] | None = None

    def _commit(self) -> None:
        self._t0, self._P0, self._T0 = self._t1, self._P1, self._T1
        self._snap = self.net.snapshot()
        if self.schedule.watching_pressure():
            self.schedule.pressure_check(self._gauge_at_committed, self._t0)

    def _gauge_at_committed(self, node: str) -> float:
        return self._P0[self.node_index[node]] - self.ambient_pressure(self._t0)

    def _step(self, h: float) -> None:
        t0 = self._t0
        if self._static:
            self.net.step(h)
            self._t1 = t0 + h
        else:
            self._set_boundary(t0 + 0.5 * h)
            self.net.step(h, (self.lab_temperature(t0 + h) - self.lab_temperature(t0)) / h)
            self._t1 = t0 + h
            self._set_boundary(self._t1)
        self._P1, self._T1 = list(self.net.P), list(self.net.T)

    def _propose(self) -> float:
        sv = self.config.solver
        h = self.net.max_step(min(self._h_next, sv.max_step))
        nxt = self.schedule.next_time(self._t0)
        if self._closing:  # a valve still closing: step to the end of its stroke
            ends = [c for c in self._closing.values() if c > self._t0]
            if ends and (nxt is None or min(ends) < nxt):
                nxt = min(ends)
        if nxt is not None and self._t0 + h > nxt:
            h = nxt - self._t0
        return max(h, 1e-9)

    def _control(self, h: float) -> None:
        """Choose the next step so that reads between step ends stay within tolerance.

        Reads follow the parabola through this step's ends and the previous step's start
        (``_interp``); right after a valve change, with no history, a straight line.  How long the
        next step may be depends on what limits accuracy:

        - a step that moved gas is only first-order accurate, so it is kept as short as a straight
          line between its ends would need: error ~ |f[t-1, t0, t1]| h^2/4 (the parabola's bend);
        - a step with every valve path at rest (a closed relaxation) is exact at any length, so only
          the parabola's own error counts: ~ |f[t-2, t-1, t0, t1]| (h-1 + h/2) h^2/4, the cubic term.
          It grows like (h/tau)^3 rather than (h/tau)^2, so these steps may be several times longer;
          their share-of-change tolerance is a quarter of the straight line's, since a longer step
          changes more.
        """
        p0, p1 = self._P0, self._P1
        slopes = [(p1[i] - p0[i]) / h for i in self.net._var]
        curv = None
        err, order, rel = 0.0, 2.0, 1.0
        if self._slopes is None:
            self._Pm = self._Tm = None
        else:
            self._tm, self._Pm, self._Tm = self._m_next  # the previous step's start, no cut between
            hp = self._h_prev
            curv = [c / (h + hp) for c in map(operator.sub, slopes, self._slopes)]
            if self._curv is None or self.net.flowed:
                err = max(map(abs, curv), default=0.0) * h * h / 4.0
            else:
                d3 = max(map(abs, map(operator.sub, curv, self._curv)), default=0.0) / (h + hp + self._h_prev2)
                err, order, rel = d3 * (hp + 0.5 * h) * h * h / 4.0, 3.0, 0.25
        sv = self.config.solver
        # absolute accuracy for slow drifts; during a fast transient (a 50 kPa jump within 10 ms)
        # a share of the change per step is enough - no transducer resolves that shape anyway
        dmax = max(map(abs, slopes), default=0.0) * h
        tol = max(sv.interp_tol, rel * sv.interp_rel * dmax)
        fac = 2.0 if err <= 0.0 else min(2.0, max(0.2, 0.9 * (tol / err) ** (1.0 / order)))
        self._m_next = (self._t0, p0, self._T0)
        self._slopes, self._curv = slopes, curv
        self._h_prev2, self._h_prev = self._h_prev, h
        self._h_next = h * fac

    def _sync(self, t: float) -> None:
        """Make the computed interval [t0, t1) contain t."""
        while self._t1 <= t:
            self._commit()
            self._handle_due(self._t0)
            h = self._propose()
            self._step(h)
            self._control(h)

    def _cut(self, t: float) -> None:
        """Commit the state exactly at t (rolling back a step that reached past it)."""
        self._sync(t)
        if t > self._t0:
            self.net.restore(self._snap)
            self._step(t - self._t0)
        self._commit()
        self._t1 = self._t0  # nothing computed beyond t yet

    def _interp(self, a0: list[float], a1: list[float], am: list[float] | None, i: int, t: float) -> float:
        """Value of node i at t inside the computed step, from its values at the step's ends (a0, a1)
        and at the previous step's start (am): on the parabola through the three, or on the
        straight line through the ends when there is no such history (right after a cut)."""
        t0 = self._t0
        span = self._t1 - t0
        if span <= 0.0:
            return a1[i]
        s = t - t0
        y0 = a0[i]
        slope = (a1[i] - y0) / span
        if am is None:
            return y0 + slope * s
        back = t0 - self._tm
        c = (slope - (y0 - am[i]) / back) / (span + back)
        return y0 + s * (slope + c * (s - span))

    # ------------------------------------------------------------------ faults
    def _handle_due(self, t: float) -> None:
        for fs, on in self.schedule.due(t):
            self._apply_fault(fs, on, fs.fired_time if on else fs.clear_at)
        if not self._closing:  # the usual case: no valve mid-stroke (every step asks)
            return
        closed = [name for name, end in self._closing.items() if end <= t]
        if closed:  # a closing stroke has ended: the valve shuts now
            for name in closed:
                del self._closing[name]
            self._apply_valves()
            self._reset_control()

    def _apply_fault(self, fs: FaultState, on: bool, t: float | None) -> None:
        t = self._t0 if t is None else t
        f = fs.spec
        self.events.append((t, fs.label, "start" if on else "clear"))
        if f.kind == "valve_stuck":
            if on:
                self._stuck[f.valve] = f.open  # type: ignore[index]
            else:
                self._stuck.pop(f.valve, None)  # type: ignore[arg-type]
            self._apply_valves()
        elif f.kind == "valve_leak":
            if on:
                self._leak_override[f.valve] = f.conductance or 0.0  # type: ignore[index]
            else:
                self._leak_override.pop(f.valve, None)  # type: ignore[arg-type]
            self._apply_valves()
        elif f.kind == "regulator_failure":
            self._reg_fail = (t, f.rate or 0.0) if on else None
        elif f.kind == "transducer":
            mode = f.mode if on else "ok"
            if mode == "drifting" or (not on and f.mode == "drifting"):
                self.p_sensor.start_drift(t, f.drift_rate if on else 0.0)
            self._p_mode = mode or "ok"
            self._frozen = None
        elif f.kind == "disconnect":
            self._connected[f.device] = not on  # type: ignore[index]
        elif f.kind == "ambient_step":
            self._amb_step += (f.pressure_step or 0.0) * (1 if on else -1)
        elif f.kind == "lab_temperature_step":
            self._temp_step += (f.temperature_step or 0.0) * (1 if on else -1)
        self._update_static()
        self._set_boundary(t)
        self._reset_control()

    def inject(self, fault: Fault | dict) -> FaultState:
        """Arm a fault now (tests, the dashboard's fault menu).  'at' is absolute simulated time."""
        f = fault if isinstance(fault, Fault) else Fault.model_validate(fault)
        with self._lock:
            t = self.clock.now()
            self._cut(t)
            fs = self.schedule.add(f, now=t)
            self._handle_due(t)
            return fs

    # ------------------------------------------------------------------ valves
    @property
    def valve_names(self) -> tuple[str, ...]:
        return tuple(self.config.valves)

    def _apply_valves(self) -> None:
        net = self.net
        for name, li in self._valve_link.items():
            lk = net.links[li]
            lk.open = self._stuck.get(name, self._commanded[name] or name in self._closing)
            lk.conductance = self._leak_override.get(name, self.config.valves[name].leak)
        net._refresh_active()

    def set_valves(self, states: Mapping[str, bool]) -> None:
        """Command valves (the truth may differ if one is stuck)."""
        with self._lock:
            for name in states:
                if name not in self._commanded:
                    raise UnknownValve(name)
            if all(bool(want) == self._commanded[name] for name, want in states.items()):
                return  # a command that changes nothing (a repeated safe state) leaves the integration alone
            t = self.clock.now()
            self._cut(t)
            opened = []
            for name, want in states.items():
                want = bool(want)
                if want and not self._commanded[name]:
                    self._openings[name] += 1
                    opened.append(name)
                close_time = self.config.valves[name].close_time
                if want:
                    self._closing.pop(name, None)
                elif self._commanded[name] and close_time > 0.0:
                    self._closing[name] = t + close_time
                self._commanded[name] = want
            for name in opened:
                self.schedule.valve_opened(name, self._openings[name], t)
            self._apply_valves()
            self._handle_due(t)
            self._reset_control()

    def commanded(self) -> dict[str, bool]:
        with self._lock:
            return dict(self._commanded)

    def actual_valves(self) -> dict[str, bool]:
        """The physical valve states (stuck valves included) - not visible to a real board."""
        with self._lock:
            return {name: self.net.links[li].open for name, li in self._valve_link.items()}

    # ------------------------------------------------------------------ truth
    def sync(self) -> float:
        """Advance the physics to clock.now(); returns that time."""
        with self._lock:
            t = self.clock.now()
            self._sync(t)
            return t

    def advance(self, dt: float) -> float:
        """Simulated mode: let dt pass (clock.sleep) and bring the physics along."""
        self.clock.sleep(dt)
        return self.sync()

    def pressure(self, node: str) -> float:
        """True absolute pressure of a node now, Pa."""
        with self._lock:
            t = self.clock.now()
            self._sync(t)
            i = self.node_index[node]
            if self.net.nodes[i].fixed:
                self._set_boundary(t)
                p = self.net.P[i]
                self._set_boundary(self._t1)
                return p
            return self._interp(self._P0, self._P1, self._Pm, i, t)

    def gauge_pressure(self, node: str) -> float:
        with self._lock:
            return self.pressure(node) - self.ambient_pressure(self.clock.now())

    def gas_temperature(self, node: str) -> float:
        """True gas temperature of a node now, K."""
        with self._lock:
            t = self.clock.now()
            self._sync(t)
            return self._interp(self._T0, self._T1, self._Tm, self.node_index[node], t)

    def wall_temperature(self) -> float:
        return self.lab_temperature(self.clock.now())

    def moles(self, node: str) -> float:
        """Amount of gas in a node at the last committed step or cut (exact state), mol."""
        with self._lock:
            return self.net.n[self.node_index[node]]

    def total_moles(self) -> float:
        with self._lock:
            return self.net.total_moles()

    @property
    def steps(self) -> int:
        return self.net.steps

    # ------------------------------------------------------------------ devices
    def connected(self, device: str) -> bool:
        """Is this device ('valves', 'pressure', 'thermometer', 'barometer') plugged in?"""
        with self._lock:
            self._sync(self.clock.now())
            return self._connected[device]

    def transducer_mode(self) -> str:
        """'ok', 'frozen', 'silent', 'garbled', 'nan' or 'drifting' (connectivity: connected())."""
        with self._lock:
            self._sync(self.clock.now())
            return self._p_mode


    def read_pressure(self) -> SensorSample:
        """One transducer output now (gauge or absolute per config), Pa."""
        with self._lock:
            t = self.clock.now()
            self._sync(t)
            if not self._connected["pressure"]:
                return SensorSample(t, math.nan, "disconnected")
            mode = self._p_mode
            if mode in ("silent", "garbled", "nan"):
                return SensorSample(t, math.nan, mode)
            x = self._interp(self._P0, self._P1, self._Pm, self._p_node, t)
            if self.pressure_is_gauge:
                x -= self.ambient_pressure(t)
            if self._nl:  # the transducer's bow: 4 d u (1 - u) over its range, d at mid-range
                lo, span = self._nl_lo, self._nl_span
                u = (x - lo) / span
                x += 4.0 * self._nl * span * u * (1.0 - u)
            y = self.p_sensor.sample(t, x)
            if mode == "frozen":
                if self._frozen is None:
                    self._frozen = self._last_p if self._last_p is not None else y
                return SensorSample(t, self._frozen, "frozen")
            self._last_p = y
            if y <= self.p_low or y >= self.p_high:
                return SensorSample(t, y, "out_of_range")
            return SensorSample(t, y, "ok")

    def read_thermometer(self) -> SensorSample:
        with self._lock:
            t = self.clock.now()
            self._sync(t)
            th = self.config.instruments.thermometer
            if th is None or self.t_sensor is None:
                return SensorSample(t, math.nan, "disconnected")
            if not self._connected["thermometer"]:
                return SensorSample(t, math.nan, "disconnected")
            if th.at == "wall":
                x = self.lab_temperature(t)
            else:
                x = self._interp(self._T0, self._T1, self._Tm, self.node_index[th.at], t)
            return SensorSample(t, self.t_sensor.sample(t, x))

    def read_barometer(self) -> SensorSample:
        with self._lock:
            t = self.clock.now()
            self._sync(t)
            if self.b_sensor is None or not self._connected["barometer"]:
                return SensorSample(t, math.nan, "disconnected")
            return SensorSample(t, self.b_sensor.sample(t, self.ambient_pressure(t)))
