"""The measurement state machine: one run of one sequence, advanced one sample at a time.

The machine (built with ``transitions``, auto transitions off) only decides; it never waits.
Each state's entry callback commands valves, and ``step`` - called by the controller's tick
loop with every new sample, after the interlocks have seen it - checks the state's exit
condition and its time limit.  Everything a cycle measures flows one way:
sample -> settle detector -> cycle pressures -> volume (pure maths in results.py) -> record.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from transitions import Machine, MachineError

from pycnoctl.controller.domain.devices import Reading
from pycnoctl.controller.maths import results
from pycnoctl.controller.maths.settle import SettleCriteria, SettleDetector, SettleStatus
from pycnoctl.drivers.instrument import Instrument

log = logging.getLogger(__name__)

#: Run states. ``settle_filled`` and ``settle_expanded`` are the two settles of a cycle; ``baseline`` is
#: the closed, vented system settling to the wall temperature before each fill, because gas cooled by
#: the vent and trapped in an expansion volume would otherwise bias the next expansion (by several
#: per cent with helium if the vent is short).
STATES = [
    "idle",
    "purge",
    "vent",
    "baseline",
    "fill",
    "settle_filled",
    "expand",
    "settle_expanded",
    "leak_hold",
    "done",
    "fault",
    "aborted",
]
TERMINAL = frozenset({"done", "fault", "aborted"})
ACTIVE = [s for s in STATES if s not in TERMINAL]

TRANSITIONS: list[dict[str, Any]] = [
    {"trigger": "start", "source": "idle", "dest": "purge", "conditions": "_wants_purge"},
    {"trigger": "start", "source": "idle", "dest": "vent"},
    {"trigger": "purged", "source": "purge", "dest": "vent"},
    {"trigger": "vented", "source": "vent", "dest": "done", "conditions": "_all_cycles_done"},
    {"trigger": "vented", "source": "vent", "dest": "baseline"},
    {"trigger": "zeroed", "source": "baseline", "dest": "fill"},
    {"trigger": "filled", "source": "fill", "dest": "settle_filled"},
    {"trigger": "settled", "source": "settle_filled", "dest": "leak_hold", "conditions": "_is_leak_check"},
    {"trigger": "settled", "source": "settle_filled", "dest": "expand"},
    {"trigger": "expanded", "source": "expand", "dest": "settle_expanded"},
    {"trigger": "settled", "source": "settle_expanded", "dest": "vent"},
    {"trigger": "held", "source": "leak_hold", "dest": "vent"},
    {"trigger": "fail", "source": ACTIVE, "dest": "fault"},
    {"trigger": "abort", "source": ACTIVE, "dest": "aborted"},
]


@dataclass(slots=True)  # made on every tick: slots, not frozen (a frozen __init__ is markedly slower)
class Sample:
    """What one tick of the controller saw; ``gauge`` is NaN when the pressure reading is invalid."""

    index: int
    t: float
    pressure: Reading
    gauge: float  # Pa above the ambient reference
    ambient: float  # Pa absolute
    temperature: Reading | None
    valves: dict[str, bool]


@dataclass
class CycleData:
    """What one cycle has measured so far (gauge pressures relative to the ambient reference)."""

    index: int
    volume_name: str
    baseline: float = math.nan  # zero of the cycle: settled gauge of the closed, vented system
    u_baseline: float = math.nan
    ambient: float = math.nan  # Pa absolute at the baseline
    t_ambient: float = math.nan  # K of the gas trapped at baseline
    p1: float = math.nan
    u_p1: float = math.nan
    t1: float = math.nan
    settle1_time: float = math.nan
    drift1: float = math.nan
    p2: float = math.nan
    u_p2: float = math.nan
    t2: float = math.nan
    settle2_time: float = math.nan
    drift2: float = math.nan
    fill_time: float = math.nan
    leak_rate: float = math.nan
    flags: list[str] = field(default_factory=list)


def settled_u(det: SettleDetector) -> float:
    """Standard uncertainty of a settled pressure: the window regression's own, plus what is left of
    the relaxation. An exponential still drifting at dP/dt has |dP/dt|*tau to go (methods: drift
    criterion); taken as a rectangular bound (divide by sqrt 3), tau from a sound fit of the window,
    else three windows (the longest time constant a window can resolve)."""
    fit = det.fit
    tau = fit.tau if fit is not None and fit.sound else 3.0 * det.criteria.window
    drift = det.drift if math.isfinite(det.drift) else 0.0
    u_reg = det.u_estimate if math.isfinite(det.u_estimate) else 0.0
    return math.hypot(u_reg, abs(drift) * tau / math.sqrt(3.0))


class SequenceFault(Exception):
    """The sequence cannot go on (fill or vent time-out, settle time-out): the controller trips on it."""

    def __init__(self, kind: str, message: str) -> None:
        self.kind = kind
        super().__init__(message)


class RunEngine:
    """Steps one sequence through its cycles on one instrument."""

    def __init__(
        self,
        sequence: Any,
        instrument: Instrument,
        *,
        expansion_volume: str,
        emit: Callable[[str, dict[str, Any]], None] | None = None,
    ) -> None:
        self.seq = sequence
        self.instrument = instrument
        self.roles = instrument.roles
        self.volume_name = expansion_volume
        self.exp_valve = self.roles.expansion[expansion_volume]
        self.emit = emit or (lambda kind, data: None)
        self.cycles: list[CycleData] = []
        self.current: CycleData | None = None
        self.reason: str = ""
        self.fault_kind: str = ""
        self.t_state = 0.0  # when the current state was entered
        self._now = 0.0
        self._detector: SettleDetector | None = None
        self._vent_window: list[tuple[float, float, float, float]] = []  # (t, gauge, ambient, temp K)
        self._baseline = (math.nan, math.nan, math.nan, math.nan)  # zero, its u, ambient Pa, gas K
        self.warnings: list[str] = []
        self._warned: set[str] = set()
        self._temps: list[float] = []
        self._purge_pulse = 0
        self._purge_step = "fill"
        self._purge_t = 0.0
        self._leak_t: list[float] = []
        self._leak_p: list[float] = []
        self.converged_early = False
        self._steps = {name: getattr(self, f"_step_{name}") for name in ACTIVE if name != "idle"}
        self.machine = Machine(
            model=self,
            states=STATES,
            transitions=TRANSITIONS,
            initial="idle",
            auto_transitions=False,
            queued=True,
            after_state_change="_after_state_change",
        )

    # ----- machine plumbing -------------------------------------------------------------------
    state: str  # set by transitions

    def _after_state_change(self) -> None:
        self.t_state = self._now
        self.emit("state", {"state": self.state, "t": self._now, "cycle": self.cycle_number})

    @property
    def cycle_number(self) -> int:
        """1-based number of the cycle in progress (0 before the first fill)."""
        return len(self.cycles)

    @property
    def terminal(self) -> bool:
        return self.state in TERMINAL

    def _wants_purge(self) -> bool:
        return self.seq.purge is not None and self.seq.purge.pulses > 0

    def _all_cycles_done(self) -> bool:
        if self.seq.kind == "purge":
            return True
        if self.seq.kind == "leak_check":
            return len(self.cycles) >= 1
        return len(self.cycles) >= self.seq.cycles.count or self.converged_early

    def _is_leak_check(self) -> bool:
        return self.seq.kind == "leak_check"

    def _set(self, **states: bool) -> None:
        self.instrument.valves.set_valves(states)

    def _fire(self, trigger: str) -> None:
        """Fire a trigger. An invalid one is a programming slip: logged, the state stays. Anything an
        entry callback raises (a refused or failed valve command) goes up to the controller, which
        trips; the machine then already stands in the new state, which is why faults are reachable
        from every state."""
        try:
            self.machine.events[trigger].trigger(self)
        except MachineError as exc:
            log.error("ignored invalid trigger %r in state %s: %s", trigger, self.state, exc)

    # ----- public control ---------------------------------------------------------------------
    def begin(self, t: float) -> None:
        self._now = t
        self._fire("start")

    def to_fault(self, kind: str, reason: str, t: float) -> None:
        """Called by the controller after an interlock has acted: record why and stop the run."""
        if self.terminal:
            return
        self._now = t
        self.fault_kind, self.reason = kind, reason
        self.machine.events["fail"].trigger(self)

    def request_abort(self, reason: str, t: float) -> None:
        if self.terminal:
            return
        self._now = t
        self.reason = reason
        self.machine.events["abort"].trigger(self)

    # ----- state entry: valve commands only --------------------------------------------------
    def on_enter_purge(self) -> None:
        self._purge_pulse = 0
        self._begin_purge_fill()

    def _begin_purge_fill(self) -> None:
        self._purge_step = "fill"
        self._purge_t = self._now
        expansion = {v: True for v in self.roles.expansion.values()}
        self._set(**{self.roles.vent: False}, **expansion)
        self._set(**{self.roles.inlet: True})

    def on_enter_vent(self) -> None:
        self._set(**{self.roles.inlet: False})
        self._set(**{self.roles.vent: True, **{v: True for v in self.roles.expansion.values()}})

    def on_enter_baseline(self) -> None:
        self._set(**{self.roles.vent: False})
        self._detector = SettleDetector(self._criteria(self._settle_baseline()), self._now)
        self._vent_window = []

    def _settle_baseline(self) -> Any:
        return self.seq.settle_baseline

    def on_enter_fill(self) -> None:
        base = self._baseline
        self.current = CycleData(index=len(self.cycles) + 1, volume_name=self.volume_name,
                                 baseline=base[0], u_baseline=base[1], ambient=base[2], t_ambient=base[3])
        self.cycles.append(self.current)
        self.emit("cycle", {"cycle": self.current.index, "baseline": base[0]})
        # Every expansion volume is shut during the fill; the chosen one opens at expand.
        self._set(**{self.roles.vent: False})
        self._set(**{v: False for v in self.roles.expansion.values()})
        self._set(**{self.roles.inlet: True})

    def on_enter_settle_filled(self) -> None:
        self._set(**{self.roles.inlet: False})
        self._detector = SettleDetector(self._criteria(self.seq.settle_filled), self._now)
        self._temps = []

    def on_enter_expand(self) -> None:
        self._set(**{self.exp_valve: True})

    def on_enter_settle_expanded(self) -> None:
        self._detector = SettleDetector(self._criteria(self.seq.settle_expanded), self._now)
        self._temps = []

    def on_enter_leak_hold(self) -> None:
        self._leak_t, self._leak_p = [], []

    def on_enter_done(self) -> None:
        self.instrument.safe_state()

    def on_enter_fault(self) -> None:
        self.instrument.safe_state()

    def on_enter_aborted(self) -> None:
        self.instrument.safe_state()

    def _criteria(self, settle: Any) -> SettleCriteria:
        max_drift = None if settle.max_drift == "auto" else float(settle.max_drift)
        return SettleCriteria(
            window=settle.window,
            max_drift=max_drift,
            min_time=settle.min_time,
            max_time=settle.max_time,
            extrapolate=settle.extrapolate,
            u_p=self.instrument.pressure_u,
        )

    # ----- the step: exit conditions and time limits ------------------------------------------
    def step(self, s: Sample) -> None:
        """Advance on one sample (already seen by the interlocks). Never blocks."""
        self._now = s.t
        step = self._steps.get(self.state)
        if step is not None:  # idle and the end states have no step
            step(s)

    def _elapsed(self) -> float:
        return self._now - self.t_state

    def _step_purge(self, s: Sample) -> None:
        purge = self.seq.purge
        dt = self._now - self._purge_t
        if self._purge_step == "fill":
            if math.isfinite(s.gauge) and s.gauge >= purge.pressure:
                self._set(**{self.roles.inlet: False})
                self._purge_step, self._purge_t = "hold", self._now
            elif dt > self.seq.fill.timeout:
                raise SequenceFault("fill_timeout", f"purge pulse did not reach {purge.pressure:.0f} Pa in "
                                    f"{self.seq.fill.timeout:g} s (gauge {s.gauge:.0f} Pa)")
        elif self._purge_step == "hold":
            if dt >= purge.hold:
                self._set(**{self.roles.vent: True})
                self._purge_step, self._purge_t = "vent", self._now
        elif self._purge_step == "vent" and dt >= purge.vent:
            self._purge_pulse += 1
            self.emit("purge_pulse", {"pulse": self._purge_pulse, "of": purge.pulses})
            if self._purge_pulse >= purge.pulses:
                self._fire("purged")
            else:
                self._begin_purge_fill()

    def _step_vent(self, s: Sample) -> None:
        vent = self.seq.vent
        if self._elapsed() < vent.time:
            return
        elapsed = self._elapsed()
        vented = math.isfinite(s.gauge) and abs(s.gauge) <= vent.baseline_tolerance
        if not vented:
            if elapsed > vent.timeout:
                shown = f"{s.gauge:.0f} Pa" if math.isfinite(s.gauge) else "no valid pressure"
                raise SequenceFault("vent_timeout", f"vent did not return to ambient within {vent.timeout:g} s "
                                    f"({shown}; tolerance {vent.baseline_tolerance:.0f} Pa)")
            return
        if self.current is not None:
            self._finish_cycle()
        self._fire("vented")

    def _step_baseline(self, s: Sample) -> None:
        """Closed, vented system: wait until it stops drifting, then take the zero of the next cycle."""
        det = self._detector
        assert det is not None
        if math.isfinite(s.gauge):
            temp = s.temperature.value if s.temperature is not None and s.temperature.valid else math.nan
            self._vent_window.append((s.t, s.gauge, s.ambient, temp))
            status = det.feed(s.t, s.gauge)
        else:
            status = SettleStatus.WAITING
        settle = self._settle_baseline()
        if status is SettleStatus.WAITING:
            if self._elapsed() <= settle.max_time + 5 * self.instrument.sample_period:
                return
            status = SettleStatus.TIMED_OUT
        if status is SettleStatus.TIMED_OUT and (settle.on_timeout != "accept" or not math.isfinite(det.estimate)):
            raise SequenceFault("settle_timeout", f"the vented system did not settle within {settle.max_time:g} s "
                                f"(drift {det.drift:.3g} Pa/s) - a leaking inlet or a thermal transient")
        counts = len(self.cycles) + 1 > self.seq.cycles.discard  # discarded cycles may start unsettled
        if abs(det.estimate) > self.seq.vent.baseline_tolerance and counts and "baseline" not in self._warned:
            self._warned.add("baseline")
            self.warnings.append(
                f"cycle {len(self.cycles) + 1}: the closed, vented system settled {det.estimate:.0f} Pa above "
                "ambient - gas cooled by the vent warming up, or a sample giving off gas; a longer vent.time "
                "lets it reach the wall temperature while still open (the volume stays right either way)")
            self.emit("warning", {"message": self.warnings[-1]})
        recent = self._vent_window[-20:]
        temps = [w[3] for w in recent if math.isfinite(w[3])]
        self._baseline = (det.estimate, settled_u(det), sum(w[2] for w in recent) / len(recent),
                          sum(temps) / len(temps) if temps else math.nan)
        self._fire("zeroed")

    def _step_fill(self, s: Sample) -> None:
        cyc = self.current
        assert cyc is not None
        target = self._fill_target()  # gauge above ambient, as the sequence states it
        if math.isfinite(s.gauge) and s.gauge >= target:
            cyc.fill_time = self._elapsed()
            self._fire("filled")
        elif self._elapsed() > self.seq.fill.timeout:
            raise SequenceFault("fill_timeout", f"fill did not reach {target:.0f} Pa within "
                                f"{self.seq.fill.timeout:g} s (gauge {s.gauge:.0f} Pa)")

    def _fill_target(self) -> float:
        if self.seq.kind == "leak_check" and self.seq.leak_check is not None:
            return self.seq.leak_check.pressure
        return self.seq.fill.target

    def _settle(self, s: Sample, which: str) -> None:
        det = self._detector
        cyc = self.current
        assert det is not None and cyc is not None
        if s.temperature is not None and s.temperature.valid:
            self._temps.append(s.temperature.value)
        status = det.feed(s.t, s.gauge) if math.isfinite(s.gauge) else SettleStatus.WAITING
        if status is SettleStatus.WAITING:
            if self._elapsed() > det.criteria.max_time + 5 * self.instrument.sample_period:
                status = SettleStatus.TIMED_OUT  # no valid samples at all
            else:
                return
        settle = self.seq.settle_filled if which == "1" else self.seq.settle_expanded
        if status is SettleStatus.TIMED_OUT:
            if settle.on_timeout != "accept" or not math.isfinite(det.estimate):
                raise SequenceFault("settle_timeout", f"pressure did not settle within {settle.max_time:g} s "
                                    f"(drift {det.drift:.3g} Pa/s) - a leak, a porous sample still filling, "
                                    "or a thermal transient")
            cyc.flags.append(f"unsettled_p{which}")
        temp = sum(self._temps[-20:]) / len(self._temps[-20:]) if self._temps else math.nan
        values = {"p": det.estimate - cyc.baseline, "u": settled_u(det), "t": temp,
                  "time": det.elapsed, "drift": det.drift}
        if which == "1":
            cyc.p1, cyc.u_p1, cyc.t1, cyc.settle1_time, cyc.drift1 = values.values()
        else:
            cyc.p2, cyc.u_p2, cyc.t2, cyc.settle2_time, cyc.drift2 = values.values()
        self.emit("settled", {"cycle": cyc.index, "which": f"p{which}", **values})
        self._fire("settled")

    def _step_settle_filled(self, s: Sample) -> None:
        self._settle(s, "1")

    def _step_expand(self, s: Sample) -> None:
        self._fire("expanded")

    def _step_settle_expanded(self, s: Sample) -> None:
        self._settle(s, "2")

    def _step_leak_hold(self, s: Sample) -> None:
        if math.isfinite(s.gauge):
            self._leak_t.append(s.t)
            self._leak_p.append(s.gauge)
        if self._elapsed() >= self.seq.leak_check.hold:
            cyc = self.current
            assert cyc is not None
            cyc.leak_rate = results.slope(self._leak_t, self._leak_p)
            if -cyc.leak_rate > self.seq.leak_check.max_rate:
                cyc.flags.append("leak")
            self._fire("held")

    def _finish_cycle(self) -> None:
        cyc = self.current
        assert cyc is not None
        self.current = None
        self.emit("cycle_done", {"cycle": cyc.index})
        cycles = self.seq.cycles
        # the volumes so far are worked out only when convergence may end the run: every complete
        # cycle's budget, again at every cycle end, is the costliest step of a simulated run otherwise
        if self.seq.kind == "measure" and cycles.converge is not None and cycles.stop_on_converge:
            kept = [c for c in self.cycle_results() if c.kept]
            if results.has_converged([c.volume_m3 for c in kept], cycles.converge.last, cycles.converge.within):
                self.converged_early = True

    # ----- results ----------------------------------------------------------------------------
    def cycle_results(self) -> list[results.CycleResult]:
        """Every complete cycle turned into a volume (a cycle cut short by a fault is left out)."""
        out = []
        chambers = self.instrument.chambers.for_expansion(self.volume_name)
        for cyc in self.cycles:
            if not (math.isfinite(cyc.p1) and math.isfinite(cyc.p2)):
                continue
            out.append(results.cycle_result(
                cyc, chambers, gas=self.seq.gas, u_p=self.instrument.pressure_u,
                u_t=self.instrument.temperature_u, discard=self.seq.cycles.discard,
            ))
        return out
