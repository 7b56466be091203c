"""The measurement state machine: one run of one sequence, advanced one sample at a time.

The machine (built with ``transitions``, auto transitions off) only decides; it never waits.
Each state's entry callback commands valves, and ``step`` - called by the controller's tick
loop with every new sample, after the interlocks have seen it - checks the state's exit
condition and its time limit.  The engine measures nothing itself: every sample goes to the
cycle measurer (maths/cycle.py), whose answer (a settle decided) ends a settle state, and which
``pycnoctl analyze`` feeds the stored trace through in the same way. Everything a cycle measures
flows one way: sample -> CycleMeasurer -> CycleResult (on the cycle_done event) -> run result -> record.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from transitions import Machine, MachineError

from pycnoctl.controller.domain.devices import Reading
from pycnoctl.controller.domain.states import TERMINAL as STATES_TERMINAL
from pycnoctl.controller.domain.states import RunState
from pycnoctl.controller.maths import results
from pycnoctl.controller.maths.cycle import AmbientModel, CycleData, CycleMeasurer, CyclePlan
from pycnoctl.controller.maths.settle import SettleCriteria, SettleStatus, min_window
from pycnoctl.controller.run.heldwatch import FillWatch
from pycnoctl.drivers.instrument import Instrument

log = logging.getLogger(__name__)

#: K between the lowest and highest 5-second mean of the thermometer from a fill's start to its P1
#: beyond which it reads the gas, not the wall (see RunEngine._watch_thermometer); 5 s, not 1: a
#: thermometer read twice a second has two readings in a second, and a noisy one's means wander
GAS_THERMOMETER_K = 0.3
GAS_THERMOMETER_BLOCK = 5.0

#: Run states (controller.domain.states.RunState). ``settle_filled`` and ``settle_expanded`` are the two
#: settles of a cycle; ``baseline`` is the closed, vented system settling to the wall temperature before
#: each fill, because gas cooled by the vent and trapped in an expansion volume would otherwise bias the
#: next expansion (by several per cent with helium if the vent is short). A purge pulse is three states
#: (purge_fill, purge_hold, purge_vent), so the trace shows every pulse. ``purge`` only names the whole
#: purge in records written before the pulses were states; the engine never enters it.
S = RunState
STATES = [s.value for s in RunState if s is not S.PURGE]
TERMINAL = frozenset(s.value for s in STATES_TERMINAL)
ACTIVE = [s for s in STATES if s not in TERMINAL]

_TABLE: list[dict[str, Any]] = [
    {"trigger": "start", "source": S.IDLE, "dest": S.PURGE_FILL, "conditions": "_wants_purge"},
    {"trigger": "start", "source": S.IDLE, "dest": S.VENT},
    {"trigger": "purge_filled", "source": S.PURGE_FILL, "dest": S.PURGE_HOLD},
    {"trigger": "purge_held", "source": S.PURGE_HOLD, "dest": S.PURGE_VENT},
    {"trigger": "pulsed", "source": S.PURGE_VENT, "dest": S.VENT, "conditions": "_all_pulses_done"},
    {"trigger": "pulsed", "source": S.PURGE_VENT, "dest": S.PURGE_FILL},
    {"trigger": "vented", "source": S.VENT, "dest": S.DONE, "conditions": "_all_cycles_done"},
    {"trigger": "vented", "source": S.VENT, "dest": S.BASELINE},
    {"trigger": "zeroed", "source": S.BASELINE, "dest": S.FILL},
    {"trigger": "filled", "source": S.FILL, "dest": S.SETTLE_FILLED},
    {"trigger": "settled", "source": S.SETTLE_FILLED, "dest": S.LEAK_HOLD, "conditions": "_is_leak_check"},
    {"trigger": "settled", "source": S.SETTLE_FILLED, "dest": S.EXPAND},
    {"trigger": "expanded", "source": S.EXPAND, "dest": S.SETTLE_EXPANDED},
    {"trigger": "settled", "source": S.SETTLE_EXPANDED, "dest": S.VENT},
    {"trigger": "held", "source": S.LEAK_HOLD, "dest": S.VENT},
    {"trigger": "fail", "source": ACTIVE, "dest": S.FAULT},
    {"trigger": "abort", "source": ACTIVE, "dest": S.ABORTED},
]
# transitions names an Enum state by its member name: give it the trace names (the enum values)
TRANSITIONS = [{k: v.value if isinstance(v, RunState) else v for k, v in row.items()} for row in _TABLE]


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


class SequenceFault(Exception):
    """The sequence cannot go on (fill or vent time-out, settle time-out): the controller trips on it."""

    def __init__(self, kind: str, message: str) -> None:
        self.kind = kind
        super().__init__(message)


class RunEngine:
    """Steps one sequence through its cycles on one instrument; the cycle measurer does the measuring."""

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
        self.meter = CycleMeasurer(self.plan(sequence, instrument, expansion_volume))
        self._grace = 5 * instrument.sample_period  # the engine's own settle limit waits this past max_time
        self.cycle_number = 0  # 1-based number of the cycle in progress (0 before the first fill)
        self.reason: str = ""
        self.fault_kind: str = ""
        self.t_state = 0.0  # when the current state was entered
        self._now = 0.0
        self.warnings: list[str] = []
        self._warned: set[str] = set()
        self._tblock: tuple[int, float, int] | None = None  # (block, sum, count) of thermometer readings
        self._tmeans = (math.inf, -math.inf)  # the lowest and highest 5-second mean since the fill began
        self._held = FillWatch()  # this fill's pressure readings: does the transducer hold them?
        self._purge_pulse = 0
        self._status: SettleStatus | None = None  # the measurer's answer on the current sample
        self.converged_early = False
        self._final_vent: bool | None = None  # the vent now open ends the run (None: not yet known)
        self._steps = {name: getattr(self, f"_step_{name}") for name in ACTIVE if name != S.IDLE}
        self.machine = Machine(
            model=self,
            states=STATES,
            transitions=TRANSITIONS,
            initial=S.IDLE.value,
            auto_transitions=False,
            queued=True,
            after_state_change="_after_state_change",
        )

    @staticmethod
    def plan(sequence: Any, instrument: Instrument, expansion_volume: str) -> CyclePlan:
        """The measurer's rules for this sequence on this instrument (replay builds the same)."""
        return cycle_plan(sequence, chambers=instrument.chambers.for_expansion(expansion_volume),
                          gas=sequence.gas, u_p=instrument.pressure_u, u_t=instrument.temperature_u,
                          u_p_sys=linearity_u(instrument.pressure_u, instrument.pressure_u_linearity),
                          volume_name=expansion_volume,
                          ambient=AmbientModel(instrument.barometer is not None, instrument.barometer_u,
                                               instrument.ambient_drift_rate, instrument.pressure_is_gauge),
                          thermometer=instrument.thermometer is not None)

    # ----- machine plumbing -------------------------------------------------------------------
    state: str  # set by transitions

    def _after_state_change(self) -> None:
        self.t_state = self._now
        self.emit("state", {"state": self.state, "t": self._now, "cycle": self.cycle_number})

    @property
    def cycles(self) -> list[CycleData]:
        """Every cycle begun so far (the measurer's)."""
        return self.meter.cycles

    @property
    def current(self) -> CycleData | None:
        return self.meter.current if self.meter.current is not None and \
            self.meter.current.index == self.cycle_number else None

    @property
    def terminal(self) -> bool:
        return self.state in TERMINAL

    def _wants_purge(self) -> bool:
        return self.seq.purge is not None and self.seq.purge.pulses > 0

    def _all_pulses_done(self) -> bool:
        return self._purge_pulse >= self.seq.purge.pulses

    def _all_cycles_done(self) -> bool:
        if self.seq.kind == "purge":
            return True
        if self.seq.kind == "leak_check":
            return self.cycle_number >= 1
        return self.cycle_number >= self.seq.cycles.count or self.converged_early

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
    def _expansions_for_run(self) -> dict[str, bool]:
        """The run's own expansion volume open, every other one shut. Why: a volume this run never
        expands into need not be purged (on the clean demo it more than doubled each purge pulse's
        fill), and shut it cannot pass its air to the cell through the vents and zeros between
        cycles; its own run purges it."""
        return {v: v == self.exp_valve for v in self.roles.expansion.values()}

    def on_enter_purge_fill(self) -> None:
        self._held = FillWatch()
        self._set(**{self.roles.vent: False}, **self._expansions_for_run())
        self._check_supply()
        self._set(**{self.roles.inlet: True})

    def _check_supply(self) -> None:
        """Before the inlet opens: the supply gauge, where one is fitted and a limit set, must read
        valid and at most ``max_supply_pressure``. Why: a regulator that failed wide open between two
        fills is otherwise met only by the cell's overpressure trip, one sample (and a valve stroke)
        after the gas is in; read here, the inlet simply stays closed."""
        sensor = self.instrument.supply
        limit = self.instrument.limits.max_supply_pressure
        if sensor is None or limit is None:
            return
        r = sensor.read()
        if not r.valid or not math.isfinite(r.value):
            raise SequenceFault("supply_pressure", f"supply gauge reading not valid ({r.validity.value}); "
                                "the inlet stays closed")
        if r.value > limit:
            raise SequenceFault("supply_pressure", f"supply at {r.value:.0f} Pa, above max_supply_pressure "
                                f"{limit:.0f} Pa (a failed or mis-set regulator); the inlet stays closed")

    def on_enter_purge_hold(self) -> None:
        self._set(**{self.roles.inlet: False})

    def on_enter_purge_vent(self) -> None:
        self._set(**{self.roles.vent: True})

    def on_enter_vent(self) -> None:
        self._set(**{self.roles.inlet: False})
        self._set(**{self.roles.vent: True, **self._expansions_for_run()})
        self._final_vent = None  # known at the first vent sample, once the cycle's result is complete

    def on_enter_baseline(self) -> None:
        self._set(**{self.roles.vent: False})

    def on_enter_fill(self) -> None:
        self._tblock, self._tmeans = None, (math.inf, -math.inf)  # _watch_thermometer: this fill's means
        self._held = FillWatch()
        self.cycle_number += 1
        zero = self.meter.zero
        self.emit("cycle", {"cycle": self.cycle_number, "baseline": zero.value if zero else math.nan})
        # Every expansion volume is shut during the fill; the chosen one opens at expand.
        self._set(**{self.roles.vent: False})
        self._set(**{v: False for v in self.roles.expansion.values()})
        self._check_supply()
        self._set(**{self.roles.inlet: True})

    def on_enter_settle_filled(self) -> None:
        self._set(**{self.roles.inlet: False})

    def on_enter_expand(self) -> None:
        self._set(**{self.exp_valve: True})

    def on_enter_done(self) -> None:
        self.instrument.safe_state()

    def on_enter_fault(self) -> None:
        self.instrument.safe_state()

    def on_enter_aborted(self) -> None:
        self.instrument.safe_state()

    # ----- the step: exit conditions and time limits ------------------------------------------
    def step(self, s: Sample) -> None:
        """Advance on one sample (already seen by the interlocks and recorded). Never blocks."""
        self._now = s.t
        state = self.state
        step = self._steps.get(state)
        if step is not None:  # idle and the end states have no step
            temp = s.temperature.value if s.temperature is not None and s.temperature.valid else math.nan
            self._status = self.meter.take_sample(state, s.t, s.gauge, s.ambient, temp)
            if state in (S.FILL, S.SETTLE_FILLED) and math.isfinite(temp):
                self._watch_thermometer(s.t, temp)
            if (state == S.FILL or state == S.PURGE_FILL) and s.pressure.valid:
                self._held.add(s.pressure.value, s.gauge)
            step(s)

    def _watch_held(self, gauge: float) -> None:
        """At a fill's end: refuse a transducer that updates more slowly than it is read, at the first fill
        that shows it, naming the cure, before any cycle (controller/run/heldwatch.py says why)."""
        why = self._held.verdict(gauge, self.instrument.sample_period)
        if why is not None:
            raise SequenceFault("held_readings", why)

    def _watch_thermometer(self, t: float, temp: float) -> None:
        """Say once when the thermometer reads the gas rather than the wall: its 5-second means move
        more than GAS_THERMOMETER_K between a fill's start and its P1 (a fill heats the gas by kelvins in
        seconds; a wall moves hundredths of a kelvin in minutes, and a mean of 5 seconds' readings averages
        a noisy thermometer's noise down).  Why: the settles follow the wall by a line through the last two
        minutes of readings, and a thermometer in the gas puts each fill's heating into that line, so each
        settle waits until it has left the line: right, but several times as long (grain-volume on the
        clean demo bench: 54 simulated minutes a specimen against 5 with the thermometer on the wall; on
        the accuracy bench's 8 s cell 57 against 21)."""
        if "gas thermometer" in self._warned:
            return
        block = math.floor(t / GAS_THERMOMETER_BLOCK)
        if self._tblock is None or self._tblock[0] != block:
            if self._tblock is not None and self._tblock[2] >= 5:  # a block cut short by the fill's start
                mean = self._tblock[1] / self._tblock[2]
                self._tmeans = (min(self._tmeans[0], mean), max(self._tmeans[1], mean))
            self._tblock = (block, 0.0, 0)
        self._tblock = (block, self._tblock[1] + temp, self._tblock[2] + 1)
        lo, hi = self._tmeans
        # a thermometer stated as noisy needs more: its means may wander by a few of its u
        if hi - lo > max(GAS_THERMOMETER_K, 3.0 * self.instrument.temperature_u):
            self._warned.add("gas thermometer")
            self.warnings.append(
                f"the thermometer's reading moved {hi - lo:.2g} K between a fill's start and its P1: it reads the "
                "gas, not the wall. The volumes stay right, but each settle waits until the fill's heating has "
                "left the line through the last two minutes of its readings: several times as long as with a "
                "thermometer on the cell's wall or block (on the simulator, 54 minutes a specimen against 5 on "
                "a fast cell, 57 against 21 on one relaxing in 8 s)")
            self.emit("warning", {"message": self.warnings[-1]})

    def _elapsed(self) -> float:
        return self._now - self.t_state

    def _step_purge_fill(self, s: Sample) -> None:
        purge = self.seq.purge
        if math.isfinite(s.gauge) and s.gauge >= purge.pressure:
            self._watch_held(s.gauge)
            self._fire("purge_filled")
        elif self._elapsed() > self.seq.fill.timeout:
            raise SequenceFault("fill_timeout", f"purge pulse did not reach {purge.pressure:.0f} Pa in "
                                f"{self.seq.fill.timeout:g} s (gauge {s.gauge:.0f} Pa)")

    def _step_purge_hold(self, s: Sample) -> None:
        if self._elapsed() >= self.seq.purge.hold:
            self._fire("purge_held")

    def _step_purge_vent(self, s: Sample) -> None:
        """A pulse's vent lasts ``purge.vent`` and must also reach the vented baseline (the sequence's
        vent tolerance and time-out): a vent stuck closed would otherwise pass a purge unnoticed."""
        purge = self.seq.purge
        vent = self.seq.vent
        if self._elapsed() < purge.vent:
            return
        if not (math.isfinite(s.gauge) and abs(s.gauge) <= vent.baseline_tolerance):
            if self._elapsed() > max(vent.timeout, purge.vent):
                shown = f"{s.gauge:.0f} Pa" if math.isfinite(s.gauge) else "no valid pressure"
                raise SequenceFault("vent_timeout", f"purge pulse {self._purge_pulse + 1}: vent did not return to "
                                    f"ambient within {max(vent.timeout, purge.vent):g} s ({shown}; tolerance "
                                    f"{vent.baseline_tolerance:.6g} Pa)")
            return
        self._purge_pulse += 1
        self.emit("purge_pulse", {"pulse": self._purge_pulse, "of": purge.pulses})
        self._fire("pulsed")

    def _step_vent(self, s: Sample) -> None:
        vent = self.seq.vent
        if self._final_vent is None:
            self._final_vent = self._all_cycles_done() or self._kept_converged()
        # vent.time lets the vented gas warm back to the wall before the next zero; after the last
        # cycle there is none, so the run ends once the system is at ambient (and done opens every vent)
        if self._elapsed() < vent.time and not self._final_vent:
            return
        elapsed = self._elapsed()
        vented = math.isfinite(s.gauge) and abs(s.gauge) <= vent.baseline_tolerance
        if not vented:
            if elapsed > vent.timeout:
                shown = f"{s.gauge:.0f} Pa" if math.isfinite(s.gauge) else "no valid pressure"
                raise SequenceFault("vent_timeout", f"vent did not return to ambient within {vent.timeout:g} s "
                                    f"({shown}; tolerance {vent.baseline_tolerance:.6g} Pa)")
            return
        if self.current is not None:
            self._finish_cycle()
        self._fire("vented")

    def _step_baseline(self, s: Sample) -> None:
        """Closed, vented system: wait until it stops drifting, then take the zero of the next cycle."""
        status = self._status
        settle = self.seq.settle_baseline
        if status is SettleStatus.WAITING:
            if self._now - self.t_state <= settle.max_time + self._grace:  # inline: runs every sample
                return
            status = SettleStatus.TIMED_OUT
        leaking_in = status is SettleStatus.TIMED_OUT and self._rising_before_leak_check()
        if leaking_in:
            pass  # the leak hold measures that rise and fails the check
        elif status is SettleStatus.TIMED_OUT and (settle.on_timeout != "accept" or not self.meter.give_up()):
            self._refuse_few("the vented system", settle)
            self._refuse_slow("the vented system", settle, "giving back gas it took up")
            raise SequenceFault("settle_timeout", f"the vented system did not settle within {settle.max_time:g} s "
                                f"(drift {self.meter.drift:.3g} Pa/s) - a leaking inlet or a thermal transient"
                                f"{self._lab_hint()}")
        zero = self.meter.zero
        assert zero is not None
        counts = self.cycle_number + 1 > self.seq.cycles.discard  # discarded cycles may start unsettled
        if abs(zero.value) > self.seq.vent.baseline_tolerance and counts and "baseline" not in self._warned \
                and not leaking_in:  # not a vent's cooled gas: said above
            self._warned.add("baseline")
            self.warnings.append(
                f"cycle {self.cycle_number + 1}: the closed, vented system settled {zero.value:.0f} Pa above "
                "ambient - gas cooled by the vent warming up, or a sample giving off gas; a longer vent.time "
                "lets it reach the wall temperature while still open (the volume stays right either way)")
            self.emit("warning", {"message": self.warnings[-1]})
        self._fire("zeroed")

    def _rising_before_leak_check(self) -> bool:
        """A leak check's closed, vented system still rising at its time limit: gas coming in past the
        inlet, which is what the check is for. Its zero is taken as it stands (flagged) and the run goes
        on to the hold, whose rate then fails the check, instead of ending as a settle time-out."""
        if self.seq.kind != "leak_check" or not self.meter.drift > 0:
            return False
        if not self.meter.give_up():
            return False
        note = ("the closed, vented system was still rising at the baseline's time limit "
                f"({self.meter.drift:.3g} Pa/s): gas leaking in; the hold measures it")
        self.warnings.append(note)
        self.emit("warning", {"message": note})
        return True

    def _step_fill(self, s: Sample) -> None:
        target = self._fill_target()  # gauge above ambient, as the sequence states it
        if math.isfinite(s.gauge) and s.gauge >= target:
            self._watch_held(s.gauge)
            cyc = self.current
            if cyc is not None:
                cyc.fill_s = self._elapsed()
            self._fire("filled")
        elif self._elapsed() > self.seq.fill.timeout:
            raise SequenceFault("fill_timeout", f"fill did not reach {target:.0f} Pa within "
                                f"{self.seq.fill.timeout:g} s (gauge {s.gauge:.0f} Pa)")

    def _fill_target(self) -> float:
        if self.seq.kind == "leak_check" and self.seq.leak_check is not None:
            return self.seq.leak_check.pressure
        return self.seq.fill.target

    def _settle(self, which: str) -> None:
        status = self._status
        settle = self.seq.settle_filled if which == "1" else self.seq.settle_expanded
        if status is SettleStatus.WAITING:
            if self._now - self.t_state <= settle.max_time + self._grace:  # inline: runs every sample
                return
            status = SettleStatus.TIMED_OUT  # no valid samples at all
        if status is SettleStatus.TIMED_OUT and (settle.on_timeout != "accept" or not self.meter.give_up()):
            self._refuse_few("pressure", settle)
            self._refuse_slow("pressure", settle, "filling")
            raise SequenceFault("settle_timeout", f"pressure did not settle within {settle.max_time:g} s "
                                f"(drift {self.meter.drift:.3g} Pa/s) - a leak, a porous sample still filling, "
                                f"or a thermal transient{self._lab_hint()}")
        val = self.meter.last
        assert val is not None
        self.emit("settled", {"cycle": self.cycle_number, "which": f"p{which}", "p": val.p, "u": val.u,
                              "u_relax": val.u_relax, "t": self._now, "temp_k": val.t, "time": val.time,
                              "drift": val.drift, "window": val.window, "model": val.model})
        self._fire("settled")

    def _refuse_few(self, what: str, settle: Any) -> None:
        """A settle out of time whose window never held the samples its drift test needs: refused saying
        so, with the window the sample period needs.  Why: its drift is NaN, and 'drift nan Pa/s - a
        leak, ...' sent the operator looking for a leak when the window was shorter than two samples
        (prepare() refuses such a sequence; readings that went invalid for a window end here too)."""
        short = self.meter.shortfall
        if short is None:
            return
        dt = self.instrument.sample_period
        raise SequenceFault("settle_timeout", f"{what} did not settle within {settle.max_time:g} s - {short}; at "
                            f"one sample every {dt:g} s the window must be at least {min_window(dt):g} s")

    def _refuse_slow(self, what: str, settle: Any, pores: str) -> None:
        """A settle out of time whose trace is a relaxation slower than its window: refused naming it.
        Why: minutes-long time constants are a porous sample filling (or, at the zero, giving its gas
        back), sample heat or a slow thermal relaxation, not a leak; the operator needs the time it
        would take, not a guess at a fault.  Pores and heat exchange both relax in proportion to the
        pressure step, with the same sign, so the trace cannot tell them apart; the message names
        neither first and says the run that can (the same sequence without the specimen)."""
        slow = self.meter.slow_relaxation()
        if slow is None or not settle.window < slow[0] <= self._elapsed():
            return  # none, or none the settle resolves: a time constant longer than it is a straight line
        tau, left, needed = slow
        raise SequenceFault(
            "settle_timeout",
            f"{what} did not settle within {settle.max_time:g} s: still relaxing with a time constant of "
            f"about {tau:.0f} s ({abs(left):.0f} Pa still to {'fall' if left > 0 else 'rise'}, drift "
            f"{self.meter.drift:.3g} Pa/s); no number is given for it. Settling it would take about "
            f"{needed:.0f} s (max_time; the fit's estimate). The pressure alone cannot say whose relaxation "
            f"it is: the instrument's (the gas exchanging heat slowly with the chamber walls) or the "
            f"specimen's (a porous sample {pores}, or sample heat). Run the empty cell or a calibration "
            "sphere with the same sequence: if it relaxes as slowly, the instrument is slow")

    def _lab_hint(self) -> str:
        """Where the settles cannot follow the lab (the plan's AmbientModel: a gauge transducer, no
        barometer), a time-out may be the lab's drift beyond the bound the rules allow for it."""
        amb = self.meter.plan.ambient
        if amb is None or amb.follows_lab:
            return ""
        return (", or the lab's pressure changing faster than the instrument config's ambient_drift_rate "
                f"({amb.drift_rate:.3g} Pa/s): a gauge transducer reads against it and no barometer reads it")

    def _step_settle_filled(self, s: Sample) -> None:
        if self._status is SettleStatus.WAITING and \
                self._now - self.t_state <= self.seq.settle_filled.max_time + self._grace:
            return  # most samples: still waiting, within the time limit
        self._settle("1")

    def _step_expand(self, s: Sample) -> None:
        self._fire("expanded")

    def _step_settle_expanded(self, s: Sample) -> None:
        if self._status is SettleStatus.WAITING and \
                self._now - self.t_state <= self.seq.settle_expanded.max_time + self._grace:
            return  # most samples: still waiting, within the time limit
        self._settle("2")

    def _step_leak_hold(self, s: Sample) -> None:
        if self._elapsed() >= self.seq.leak_check.hold:
            cyc = self.current
            assert cyc is not None
            cyc.leak_rate_pa_s = self.meter.leak_rate
            if abs(cyc.leak_rate_pa_s) > self.seq.leak_check.max_rate:  # out through a seal, or in past the inlet
                cyc.flags.append("leak")
            self._fire("held")

    def _finish_cycle(self) -> None:
        """The vent after a cycle is done: tell the listeners, with the cycle's finished result."""
        cyc = self.current
        assert cyc is not None
        done = self.meter.results[-1] if self.meter.results and self.meter.results[-1].index == cyc.index \
            else None
        # "left_out": earlier cycles no longer kept (a first cycle its successors showed settled too soon
        # or still settling in: CycleMeasurer._doubt_first)
        self.emit("cycle_done", {"cycle": cyc.index, "result": done.as_dict() if done is not None else
                                 {"index": cyc.index, "flags": list(cyc.flags)},
                                 "left_out": [c.index for c in self.meter.results[:-1] if not c.kept]})
        if self._kept_converged():
            self.converged_early = True

    def _kept_converged(self) -> bool:
        """A measurement that stops once converged, whose kept cycles so far have."""
        cycles = self.seq.cycles
        if not (self.seq.kind == "measure" and cycles.converge is not None and cycles.stop_on_converge):
            return False
        kept = [c for c in self.meter.results if c.kept]
        return results.has_converged([c.volume_m3 for c in kept], cycles.converge.last, cycles.converge.within)

    # ----- results ----------------------------------------------------------------------------
    def cycle_results(self) -> list[results.CycleResult]:
        """Every complete cycle with its volume (the measurer's; a cycle cut short is left out)."""
        return list(self.meter.results)


def criteria(settle: Any, u_p: float, steady_slope: float = 0.0, gain: float = 1.0) -> SettleCriteria:
    """A sequence's settle section as the detector's criteria (``steady_slope``: see cycle_plan)."""
    remainder = getattr(settle, "max_remainder", None)  # records written before the rule have none
    max_drift = None if settle.max_drift == "auto" or remainder is not None else float(settle.max_drift)
    return SettleCriteria(window=settle.window, max_drift=max_drift, min_time=settle.min_time,
                          max_time=settle.max_time, extrapolate=settle.extrapolate, u_p=u_p,
                          max_remainder=None if remainder is None else float(remainder),
                          steady_slope=steady_slope, remainder_gain=gain)


def linearity_u(pressure_u: float, pressure_u_linearity: float | None) -> float:
    """The transducer's systematic u: as stated, else its reading u (cautious, for a config silent on it)."""
    return pressure_u if pressure_u_linearity is None else pressure_u_linearity


def cycle_plan(sequence: Any, *, chambers: Any, gas: str, u_p: float, u_t: float, volume_name: str,
               u_p_sys: float = 0.0, ambient: AmbientModel | None = None, thermometer: bool = False) -> CyclePlan:
    """The measurer's plan from a sequence: the live engine and replay both build it here.

    Where the settles cannot follow the lab pressure (a gauge transducer and no barometer), the
    instrument config's bound on the lab's drift is a steady slope the remainder rule does not wait
    out: the budget already counts that drift between a cycle's zero and its P1, P2."""
    steady = ambient.drift_rate if ambient is not None and not ambient.follows_lab else 0.0
    # the zero's remainder reaches the result through the expansion volume's gas alone (SettleCriteria)
    gain = (chambers.vc + chambers.vr) / chambers.vr if chambers.vr > 0 else 1.0
    return CyclePlan(baseline=criteria(sequence.settle_baseline, u_p, steady, gain),
                     filled=criteria(sequence.settle_filled, u_p, steady),
                     expanded=criteria(sequence.settle_expanded, u_p, steady), chambers=chambers, gas=gas, u_p=u_p,
                     u_p_sys=u_p_sys, ambient=ambient, u_t=u_t, discard=sequence.cycles.discard,
                     volume_name=volume_name, thermometer=thermometer)
