"""Fault schedule: when each configured (or injected) failure starts and clears.

Why separate from the physics: a fault is triggered by simulated time or by an event (the Nth
opening of a valve, a gauge pressure crossing a threshold), and the bench applies its effect.  The
schedule only answers "what is due now" and "when is the next thing due", so the integrator can
end a step exactly at a fault time.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from pycnoctl.sim.config import Fault


@dataclass
class FaultState:
    spec: Fault
    index: int
    fire_at: float | None = None
    clear_at: float | None = None
    active: bool = False
    done: bool = False
    fired_time: float | None = None

    @property
    def label(self) -> str:
        s = self.spec
        target = s.valve or s.device or s.mode or ""
        return f"fault {self.index} {s.kind}{' ' + target if target else ''}"


class FaultSchedule:
    def __init__(self, faults: list[Fault] | tuple[Fault, ...] = ()) -> None:
        self.states: list[FaultState] = []
        for f in faults:
            self.add(f, now=0.0)

    def add(self, f: Fault, now: float) -> FaultState:
        """Arm a fault; a fault with no trigger fires at ``now`` (plus its delay)."""
        fs = FaultState(f, len(self.states))
        if f.at is not None:
            fs.fire_at = f.at + f.delay
        elif f.on_opening is None and f.on_pressure_above is None:
            fs.fire_at = now + f.delay
        self.states.append(fs)
        return fs

    def next_time(self, after: float) -> float | None:
        """Earliest pending fire/clear time strictly after ``after``."""
        best: float | None = None
        for fs in self.states:
            if fs.done:
                continue
            for t in (fs.fire_at if not fs.active else None, fs.clear_at if fs.active else None):
                if t is not None and t > after and (best is None or t < best):
                    best = t
        return best

    def due(self, t: float) -> list[tuple[FaultState, bool]]:
        """Faults to fire (True) or clear (False) at or before t, in time order; marks them."""
        out: list[tuple[float, int, FaultState, bool]] = []
        for fs in self.states:
            if fs.done:
                continue
            if not fs.active and fs.fire_at is not None and fs.fire_at <= t:
                fs.active, fs.fired_time = True, fs.fire_at
                if fs.spec.duration is not None:
                    fs.clear_at = fs.fire_at + fs.spec.duration
                else:
                    fs.done = True  # stays on for the rest of the run
                out.append((fs.fire_at, fs.index, fs, True))
            if fs.active and fs.clear_at is not None and fs.clear_at <= t:
                fs.active, fs.done = False, True
                out.append((fs.clear_at, fs.index, fs, False))
        out.sort(key=lambda x: (x[0], x[1]))
        return [(fs, on) for _, _, fs, on in out]

    def valve_opened(self, valve: str, count: int, t: float) -> None:
        """The valve has just been commanded open for the count-th time."""
        for fs in self.states:
            trig = fs.spec.on_opening
            if trig is not None and fs.fire_at is None and trig.valve == valve and trig.count == count:
                fs.fire_at = t + fs.spec.delay

    def watching_pressure(self) -> bool:
        return any(fs.spec.on_pressure_above is not None and fs.fire_at is None for fs in self.states)

    def pressure_check(self, gauge: Callable[[str], float], t: float) -> None:
        """Arm pressure-triggered faults whose node is above its threshold at time t."""
        for fs in self.states:
            trig = fs.spec.on_pressure_above
            if trig is not None and fs.fire_at is None and gauge(trig.node) > trig.pressure:
                fs.fire_at = t + fs.spec.delay
