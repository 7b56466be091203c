"""The tick loop: read the sensors, run the interlocks first, record, then advance the run.

One Controller owns one instrument.  It keeps ticking whether or not a run is active, so the
interlocks watch the gas system while idle too.  Time comes only from the instrument's clock:
on the simulator a whole run executes far faster than real time, on hardware it paces itself.
"""

from __future__ import annotations

import contextlib
import logging
import math
import traceback
from collections.abc import Callable
from typing import Any, Protocol

from pycnoctl.controller.domain.devices import DeviceError, ForbiddenValveState, Reading, Validity
from pycnoctl.controller.domain.states import RunState
from pycnoctl.controller.run.engine import RunEngine, Sample, SequenceFault
from pycnoctl.controller.run.interlocks import InterlockMonitor, Observation, Trip
from pycnoctl.drivers.instrument import Instrument

log = logging.getLogger(__name__)


class Recorder(Protocol):
    """Where a run's samples and events go (controller.records.RunRecorder serves)."""

    def sample(self, t: float, state: str, cycle: int | None, valves: dict[str, bool], pressure: Reading,
               temperature: Reading | None = None, ambient_pa: float | None = None, note: str = "") -> None: ...

    def event(self, kind: str, t: float | None, message: str = "", **data: Any) -> None: ...


#: The callee of Controller._tick an exception came through -> the part of the tick it names.
_STAGES = {"acquire": "acquire", "observe": "interlocks", "_check_valves": "valve check",
           "trip_external": "interlocks", "sample": "record", "to_fault": "engine", "_advance": "engine",
           "emit": "listeners"}


def _stage_of(exc: BaseException) -> str:
    """Which part of a tick raised: the function _tick called on the way to the exception."""
    tb = exc.__traceback__
    while tb is not None and tb.tb_frame.f_code.co_name != "_tick":
        tb = tb.tb_next
    if tb is None:
        return "tick"
    callee = tb.tb_next
    if callee is None:  # raised in _tick's own lines
        return "tick"
    return _STAGES.get(callee.tb_frame.f_code.co_name, callee.tb_frame.f_code.co_name)


class Controller:
    """Acquisition, interlocks and sequencing for one instrument."""

    #: Trips after which a reset first reopens the devices (by their stable paths).
    COMMUNICATION_TRIPS = frozenset({"device_error", "valve_command_failed", "stale", "invalid_pressurised"})

    def __init__(self, instrument: Instrument, *, readback_interval: float = 1.0) -> None:
        self.instrument = instrument
        self.readback_interval = readback_interval  # s between valve read-backs (board alive, relays right)
        self._readback_due = -math.inf
        self.monitor = InterlockMonitor(
            instrument.limits, instrument.roles, act=instrument.safe_state, on_trip=self._on_trip
        )
        self.engine: RunEngine | None = None
        self.recorder: Recorder | None = None
        self.index = 0
        self.last: Sample | None = None
        self.listeners: list[Callable[[str, dict[str, Any]], None]] = []
        self._ambient = instrument.ambient_nominal
        self._baro_due = -math.inf
        self._temp: Reading | None = None
        self._temp_due = -math.inf
        self._record_failed: str | None = None
        self.stage = "idle"  # the part of the tick the last exception came from (_stage_of), for its record
        self._last_failure: str | None = None
        self.repeated_failures = 0  # the same exception again while latched: not recorded again
        instrument.safe_state()

    # ----- events -----------------------------------------------------------------------------
    def notify(self, kind: str, data: dict[str, Any]) -> None:
        """Tell the listeners only (what the record already holds: a run's warnings from before it started)."""
        for listener in list(self.listeners):
            try:
                listener(kind, data)
            except Exception:  # a broken viewer must never stop the loop
                log.exception("listener failed on %s", kind)

    def emit(self, kind: str, data: dict[str, Any]) -> None:
        """Tell the record and every listener (terminal view, daemon stream)."""
        if "t" not in data and self.last is not None:
            data = {**data, "t": self.last.t}
        if self.recorder is not None and kind != "sample":
            rest = {k: v for k, v in data.items() if k not in ("t", "message")}
            try:
                self.recorder.event(kind, data.get("t"), str(data.get("message", "")), **rest)
            except Exception as exc:  # a record that cannot be written ends the run (write_error)
                log.error("event %s not recorded: %s", kind, exc)
                self._record_failed = str(exc)
        self.notify(kind, data)

    def _on_trip(self, trip: Trip) -> None:
        self.emit("trip", {"interlock": trip.kind, "message": trip.message, "t": trip.t,
                           "value": trip.value, "limit": trip.limit})

    # ----- acquisition ------------------------------------------------------------------------
    def acquire(self) -> Sample:
        inst = self.instrument
        t = inst.clock.now()
        pressure = inst.pressure.read()
        if inst.barometer is not None and t >= self._baro_due:
            baro = inst.barometer.read()
            if baro.valid:
                self._ambient = baro.value
            self._baro_due = t + 1.0
        if inst.thermometer is not None and t >= self._temp_due:
            self._temp = inst.thermometer.read()
            self._temp_due = t + max(inst.sample_period, 0.5)
        if pressure.valid:
            gauge = pressure.value if inst.pressure_is_gauge else pressure.value - self._ambient
        else:
            gauge = math.nan
        try:
            valves = inst.valves.commanded()
        except DeviceError:
            valves = {}
        self.index += 1
        return Sample(self.index, t, pressure, gauge, self._ambient, self._temp, valves)

    def _check_valves(self, t: float) -> str | None:
        """Read the relays back now and then: a board that has gone silent, or relays that do not
        match what was commanded, must not wait for the next valve command to be noticed."""
        if t < self._readback_due:
            return None
        self._readback_due = t + self.readback_interval
        valves = self.instrument.valves
        try:
            back = valves.read_back()
        except DeviceError as exc:
            return f"valve board not answering: {exc}"
        if back is None:
            return None
        wrong = sorted(k for k, v in valves.commanded().items() if k in back and back[k] != v)
        return f"relays disagree with their commands: {', '.join(wrong)}" if wrong else None

    def tick(self) -> Sample:
        """One sample through the whole path: sensors -> interlocks -> record -> sequence.

        Any exception on the way ends in fail(): safe state, the exception in the record, the run
        ended as a fault.  Nothing escapes a tick."""
        try:
            return self._tick()
        except Exception as exc:
            self.stage = _stage_of(exc)
            t = self.last.t if self.last is not None else math.nan
            with contextlib.suppress(Exception):  # a broken clock must not stop the safe state
                t = self.instrument.clock.now()
            self.fail(exc, self.stage, t)
            why = f"no reading: {type(exc).__name__} in {self.stage}"
            reading = Reading.invalid("Pa", t, Validity.TIMEOUT, why)
            return Sample(self.index, t, reading, math.nan, self._ambient, self._temp, {})

    def _tick(self) -> Sample:
        # No bookkeeping of "where are we" on the way: an exception's traceback says which part of
        # the tick raised (_stage_of), so the path every sample takes pays nothing for it.
        s = self.acquire()
        self.last = s
        engine = self.engine
        state = engine.state if engine is not None else RunState.IDLE.value
        trip = self.monitor.observe(Observation(t=s.t, reading=s.pressure, gauge=s.gauge,
                                                valves=s.valves, phase=state))
        if trip is None and s.t >= self._readback_due and self.monitor.latched is None:
            problem = self._check_valves(s.t)
            if problem is not None:
                trip = self.monitor.trip_external("device_error", s.t, problem)
        if self.recorder is not None:
            try:
                self.recorder.sample(s.t, state, engine.cycle_number if engine else None, s.valves,
                                     s.pressure, s.temperature, s.ambient)
            except OSError as exc:
                self._record_failed = str(exc)
            if self._record_failed is not None:
                trip = trip or self.monitor.trip_external(
                    "write_error", s.t, f"run record not saved: {self._record_failed}")
                self.recorder, self._record_failed = None, None
        if trip is not None and engine is not None:
            engine.to_fault(trip.kind, trip.message, s.t)
        elif engine is not None and not engine.terminal:
            self._advance(engine, s)
        if self.listeners:  # the fast path of a simulated run has none
            self.emit("sample", {"t": s.t, "gauge": s.gauge, "valid": s.pressure.validity.value,
                                 "state": engine.state if engine else RunState.IDLE.value, "valves": s.valves})
        return s

    def fail(self, exc: BaseException, where: str, t: float) -> None:
        """The one path from an unexpected exception: safe state first (through the interlock, which
        latches), then the exception into the run's events, then the run ended as a fault."""
        message = f"{type(exc).__name__} in {where}: {exc}"
        if self.monitor.latched is not None and message == self._last_failure:
            self.repeated_failures += 1  # the same fault every tick (idle, latched): act, but say it once
            self.instrument.safe_state()
            return
        self._last_failure = message
        log.error("unhandled %s", message)
        try:
            self.monitor.trip_external("exception", t, message)  # acts (safe state), records, latches
        except Exception as inner:  # the monitor itself broke: still reach the safe state
            log.error("interlock monitor failed while tripping: %s: %s", type(inner).__name__, inner)
            self.instrument.safe_state()
        frames = traceback.extract_tb(exc.__traceback__)
        origin = f"{frames[-1].filename}:{frames[-1].lineno} in {frames[-1].name}" if frames else ""
        self.emit("exception", {"t": t, "message": message, "type": type(exc).__name__, "error": str(exc),
                                "where": where, "origin": origin,
                                "traceback": traceback.format_exception(exc)[-12:],
                                "safe_state_ok": self.instrument.safe_state_error is None})
        if where == "record":  # a recorder that raises once will raise again: stop feeding it samples
            self.recorder = None
        engine = self.engine
        if engine is not None:
            try:
                engine.to_fault("exception", message, t)
            except Exception as inner:
                log.error("engine could not record the fault: %s: %s", type(inner).__name__, inner)

    def _advance(self, engine: RunEngine, s: Sample) -> None:
        try:
            engine.step(s)
            return
        except SequenceFault as exc:
            kind, message = exc.kind, str(exc)
        except ForbiddenValveState as exc:
            kind, message = "valve_command_failed", f"refused valve combination: {exc}"
        except DeviceError as exc:
            kind, message = "device_error", str(exc)
        except Exception as exc:  # the loop must reach the safe state whatever went wrong
            self.fail(exc, f"engine step ({engine.state})", s.t)
            return
        trip = self.monitor.trip_external(kind, s.t, message)
        engine.to_fault(trip.kind if trip else kind, message, s.t)

    # ----- running ----------------------------------------------------------------------------
    def start(self, engine: RunEngine, recorder: Recorder | None = None) -> None:
        if self.monitor.latched is not None:
            raise RuntimeError(f"interlock latched ({self.monitor.latched.kind}): reset first")
        if self.engine is not None and not self.engine.terminal:
            raise RuntimeError("a run is already active")
        self.engine, self.recorder = engine, recorder
        engine.emit = self.emit
        try:
            engine.begin(self.instrument.clock.now())
        except Exception as exc:
            trip = self.monitor.trip_external("valve_command_failed", self.instrument.clock.now(), str(exc))
            engine.to_fault(trip.kind if trip else "exception", str(exc), self.instrument.clock.now())

    def run_until_done(self, should_stop: Callable[[], bool | str] = lambda: False,
                       max_duration: float | None = None) -> str:
        """Tick at the sample period until the active run ends; returns its final state.

        ``should_stop`` is asked before every tick; True (or a reason, as text) aborts the run."""
        engine = self.engine
        assert engine is not None
        clock = self.instrument.clock
        period = self.instrument.sample_period
        t_end = clock.now() + max_duration if max_duration else math.inf
        due = clock.now()
        while not engine.terminal:
            stop = should_stop()
            if stop:
                engine.request_abort(stop if isinstance(stop, str) else "stopped by the operator", clock.now())
                break
            self.tick()
            if clock.now() > t_end:
                engine.request_abort(f"run exceeded {max_duration:g} s", clock.now())
                break
            due += period
            wait = due - clock.now()
            if wait > 0:
                clock.sleep(wait)
            else:
                due = clock.now()  # fell behind: never try to catch up in a burst
        self.tick()  # the terminal state's safe valves go into the record
        return engine.state

    def reset(self) -> bool:
        """Operator reset of a latched interlock, accepted only once the condition is gone.

        After a communication fault the devices are reopened first (by their stable paths)."""
        latched = self.monitor.latched
        if latched is not None and latched.kind in self.COMMUNICATION_TRIPS:
            result = self.instrument.reconnect()
            self.emit("reconnect", {"result": result})
        s = self.acquire()
        ok = self.monitor.reset(Observation(t=s.t, reading=s.pressure, gauge=s.gauge,
                                            valves=s.valves, phase=RunState.IDLE.value))
        self.emit("reset", {"accepted": ok, "t": s.t})
        return ok

