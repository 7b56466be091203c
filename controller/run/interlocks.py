"""Software interlocks: a second layer behind the hardware relief valve, never the protection.

The engine calls ``InterlockMonitor.observe`` on every pressure sample (also while idle), in
the acquisition path, before any sequence logic.  A trip acts first (``act()``: the engine
binds it to ``Instrument.safe_state``), then records why (``on_trip`` and the log), then
returns the Trip for the state machine.  Trips latch; ``reset`` clears only on a fresh
observation that shows the condition gone (valid reading, below limits, vented), and never
restarts anything.

Each rule is one small class below: the limit fields it reads (declared in
``controller.domain.gaspath.Limits``), its check and its message.  ``RULES`` gives their order;
the first rule that trips on an observation wins and the later ones do not see it.  A rule looks
at valid samples, invalid ones, or both (``sees``), and may say in which valve configurations it
can trip at all (``armed``, asked only when the valves change).  Adding an interlock: a rule class here, its
place in ``RULES``, its limit field(s) in ``Limits``.

Engine-raised kinds go through ``trip_external`` with the same order: fill_timeout,
vent_timeout, valve_command_failed, device_error, exception, write_error, supply_pressure,
held_readings.
"""

from __future__ import annotations

import logging
import math
from collections import deque
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from pycnoctl.controller.domain.devices import Reading
from pycnoctl.controller.domain.gaspath import Limits, ValveRoles

log = logging.getLogger(__name__)

EXTERNAL_KINDS = (
    "fill_timeout",
    "vent_timeout",
    "settle_timeout",
    "valve_command_failed",
    "device_error",
    "exception",
    "write_error",
    "supply_pressure",
    "held_readings",
)
#: Limits fields read by the engine rather than by a rule on the cell's samples.
ENGINE_LIMITS = ("max_supply_pressure",)


@dataclass(slots=True)  # made on every tick: slots, not frozen (a frozen __init__ is markedly slower)
class Observation:
    """One pressure sample as the interlocks see it: the reading, its gauge value, the valves."""

    t: float
    reading: Reading
    gauge: float  # gauge Pa; nan when the reading is invalid
    valves: Mapping[str, bool]  # commanded states
    phase: str


@dataclass(frozen=True)
class Trip:
    kind: str
    t: float
    message: str
    value: float | None
    limit: float | None
    sample_index: int  # index of the observation (0-based since the monitor was made) that tripped
    safe_state_ok: bool | None = None  # what act() reported: False/None when it was not confirmed


@dataclass
class _Condition:
    kind: str
    message: str
    value: float | None
    limit: float | None


@dataclass(frozen=True)
class Tuning:
    """Rule constants that are properties of the method, not of an instrument (not in Limits)."""

    rise_samples: int = 3  # samples in the rise-rate regression
    leak_persist_ratio: float = 0.8  # second-half slope / first-half slope that counts as a leak


@dataclass(slots=True)
class Seen:
    """What every rule may read: the monitor's running view of the gas path, updated before the
    rules run on each observation (cleared by a reset)."""

    t: float = math.nan
    gap: float = 0.0  # s since the last valid sample before this one (or the start reference)
    inlet_open: bool = False
    vent_open: bool = False  # commanded; both valve roles are looked up only when the valves change
    t_ref_valid: float | None = None  # last valid sample time (or the start reference)
    last_valid_gauge: float | None = None  # this sample's gauge when it is valid
    inlet_open_since: float | None = None
    vented_since: float | None = None  # vent commanded open with the inlet closed, since
    valves: dict[str, bool] | None = None
    valves_changed_at: float = -math.inf
    valve_changes: int = 0
    opened_now: bool = False  # a valve went from closed to open on this observation
    inlet_closed_last: bool = False  # the last valve change closed the inlet and changed nothing else
    vent_closed_last: bool = False  # the last valve change closed the vent (with the inlet closed): gas just vented




def _slope(t: np.ndarray, p: np.ndarray) -> float:
    tc = t - t.mean()
    den = float(tc @ tc)
    return float(tc @ (p - p.mean())) / den if den > 0 else math.nan


def _slope_pairs(pairs: Iterable[tuple[float, float]]) -> float:
    """Least-squares slope of a few (t, p) pairs in plain Python: on the every-sample path numpy's
    per-call overhead on three points costs more than the arithmetic."""
    n = st = sp = stt = stp = 0.0
    t0 = None
    for t_abs, p in pairs:
        if t0 is None:
            t0 = t_abs
        t = t_abs - t0  # shifted: a daemon's clock reaches 1e6 s, where t*t would cancel badly
        n += 1.0
        st += t
        sp += p
        stt += t * t
        stp += t * p
    den = n * stt - st * st
    return (n * stp - st * sp) / den if den > 0 else math.nan


# ---------------------------------------------------------------------------------------- rules

class Rule:
    """One interlock: the Limits fields it reads, its check on one observation, its message.

    A rule keeps its own memory between samples (a fresh instance after a reset); it is asked only
    when no rule before it in RULES has tripped on the observation.
    """

    kind: ClassVar[str]
    fields: ClassVar[tuple[str, ...]]  # the Limits fields this rule reads
    sees: ClassVar[str] = "valid"  # which samples it is asked about: "valid", "invalid" or "both"

    @staticmethod
    def armed(seen: Seen) -> bool:
        """Whether the rule can trip with the valves as they are now (``seen`` after a valve change).

        Asked only when the commanded valves change, so a rule that cannot trip in a configuration
        costs nothing per sample there.  A rule whose memory must follow every sample stays armed.
        """
        return True

    def __init__(self, limits: Limits, tuning: Tuning) -> None:
        self.limits = limits

    def check(self, obs: Observation, seen: Seen) -> _Condition | None:
        raise NotImplementedError


class InvalidPressurised(Rule):
    """An invalid reading (any non-VALID flag, or a non-finite gauge value) while pressurised: last
    valid gauge above ``invalid_trip_pressure``, or the inlet commanded open.  Invalid readings never
    enter any calculation."""

    kind = "invalid_pressurised"
    fields = ("invalid_trip_pressure",)
    sees = "invalid"

    def check(self, obs: Observation, seen: Seen) -> _Condition | None:
        last_g = seen.last_valid_gauge
        limit = self.limits.invalid_trip_pressure
        if not (seen.inlet_open or (last_g is not None and last_g > limit)):
            return None
        last = "none" if last_g is None else f"{last_g:.6g} Pa"
        flag = obs.reading.validity.value
        if obs.reading.detail:
            flag += f": {obs.reading.detail}"
        return _Condition(
            self.kind,
            f"invalid reading ({flag}) while pressurised (last valid gauge {last},"
            f" inlet {'open' if seen.inlet_open else 'closed'}, phase {obs.phase})",
            last_g,
            limit,
        )


class Overpressure(Rule):
    """A valid gauge pressure above ``max_pressure``: the first such sample trips."""

    kind = "overpressure"
    fields = ("max_pressure", "relief_setting")  # the relief setting bounds max_pressure at load

    def __init__(self, limits: Limits, tuning: Tuning) -> None:
        super().__init__(limits, tuning)
        self.limit = limits.max_pressure  # read on every sample: kept as a plain attribute

    def check(self, obs: Observation, seen: Seen) -> _Condition | None:
        g = float(obs.gauge)
        limit = self.limit
        if not g > limit:
            return None
        return _Condition(self.kind, f"gauge {g:.6g} Pa above max_pressure {limit:.6g} Pa (phase {obs.phase})",
                          g, limit)


class Stale(Rule):
    """More than ``stale_after`` s since the last valid sample, in any phase.  The engine must observe
    every tick, passing an invalid TIMEOUT reading when the sensor gave nothing; a valid sample that
    ends a longer gap also trips (the loop itself stalled)."""

    kind = "stale"
    fields = ("stale_after",)
    sees = "both"

    def __init__(self, limits: Limits, tuning: Tuning) -> None:
        super().__init__(limits, tuning)
        self.limit = limits.stale_after

    def check(self, obs: Observation, seen: Seen) -> _Condition | None:
        limit = self.limit
        if not seen.gap > limit:
            return None
        return _Condition(self.kind, f"no valid pressure sample for {seen.gap:.3g} s"
                          f" (limit {limit:.3g} s, phase {obs.phase})", seen.gap, limit)


class RiseRate(Rule):
    """Least-squares dP/dt over the last ``rise_samples`` samples, or new readings, above ``max_rise_rate``.

    A sample that repeats the last raw reading is not a new look at the pressure: a transducer that
    updates more slowly than it is sampled holds its value, then steps by what the pressure moved
    meanwhile.  Regressing the held samples puts that step into one sample period (a 1 Hz gauge read
    at 10 Hz on a 70 kPa/s fill showed 2e5 Pa/s and tripped every fill).  So two views are judged:
    the new readings, each at the time it first appeared (a held gauge's true rate), and the plain
    samples only while every step of their window changed the reading (no hold inside it).  The cost:
    a surge that starts from a bit-identical reading (a quiet, quantised gauge at rest) trips one
    sample later than the plain samples alone would - the first step after a hold cannot tell a
    surge from a slow gauge's update; the next sample can.
    """

    kind = "rise_rate"
    fields = ("max_rise_rate",)

    def __init__(self, limits: Limits, tuning: Tuning) -> None:
        super().__init__(limits, tuning)
        self.n = tuning.rise_samples
        self.samples = _Window(self.n, limits.max_rise_rate)  # every valid sample
        self.fresh = _Window(self.n, limits.max_rise_rate)  # new readings at their first appearance
        self.last_raw: float | None = None
        self.changes = 0  # consecutive samples, up to this one, that changed the reading

    def check(self, obs: Observation, seen: Seen) -> _Condition | None:
        raw, t, g = obs.reading.value, seen.t, float(obs.gauge)
        new = raw != self.last_raw
        self.last_raw = raw
        self.changes = self.changes + 1 if new else 0
        # a hold inside the window: its steps are not the pressure's, and its slope is not asked for
        rate = self.samples.add(t, g, judge=self.changes >= self.n - 1)
        if new:
            fresh = self.fresh.add(t, g)
            if math.isnan(rate) or fresh > rate:
                rate = fresh
        limit = self.limits.max_rise_rate
        if not (math.isfinite(rate) and rate > limit):
            return None
        return _Condition(self.kind, f"pressure rising at {rate:.6g} Pa/s over {self.n} samples,"
                          f" limit {limit:.6g} Pa/s (phase {obs.phase})", rate, limit)


class _Window:
    """The last n (t, gauge) points and their least-squares slope, computed only when it could matter.

    The least-squares slope is a weighted mean of the pairwise slopes (weights (tj - ti)^2), and each
    pairwise slope a weighted mean of the step slopes between them (weights tj - ti): with every step
    of the window calm it cannot exceed the limit, and the regression is not needed.
    """

    def __init__(self, n: int, limit: float) -> None:
        self.n = n
        self.points: deque[tuple[float, float]] = deque(maxlen=n)
        self.calm = limit * (1.0 - 1e-6)  # the margin keeps rounding out of the argument
        self.calm_steps = 0  # consecutive calm steps up to the newest point

    def add(self, t: float, g: float, *, judge: bool = True) -> float:
        """Add a point; the window's slope, or nan when it is not full, every step is calm or it is not
        to be judged (the point is kept either way)."""
        points = self.points
        if points:
            t_prev, g_prev = points[-1]
            dt = t - t_prev
            self.calm_steps = self.calm_steps + 1 if dt > 0 and g - g_prev < self.calm * dt else 0
        points.append((t, g))
        if not judge or len(points) < self.n or self.calm_steps >= self.n - 1:
            return math.nan
        return _slope_pairs(points)


class Frozen(Rule):
    """The raw reading bit-identical for ``frozen_after`` s while the pressure must be changing.

    Why these moments and no others: a quiet, quantised gauge on a closed, settled volume may
    legitimately repeat its reading, but the pressure must move (1) while the inlet is open (the
    supply is always above the cell: a fill that reached it would have tripped overpressure), and
    (2) while the vent is open and the gauge differs from ambient by more than
    ``vent_baseline_tolerance`` (gas is leaving; a vent stuck closed still shows a live gauge's
    noise and the gas's thermal relaxation, so it stays the vent time-out's), and (3)
    after any valve opens while the gauge differs from ambient by more than
    ``vent_baseline_tolerance``: a vent or an expansion volume at ambient takes gas from the cell at
    once, so the reading must change within ``frozen_after`` of that event.  (2) and (3) catch a
    sensor that froze during a closed settle at the next valve event, instead of as a vent time-out.
    """

    kind = "frozen"
    fields = ("frozen_after", "vent_baseline_tolerance")

    def __init__(self, limits: Limits, tuning: Tuning) -> None:
        super().__init__(limits, tuning)
        self.last: float | None = None  # the last valid reading's value
        self.since = math.nan
        self.expect: float | None = None  # a valve opened at this time on a pressurised cell
        self.tolerance = limits.vent_baseline_tolerance  # read on every sample

    def check(self, obs: Observation, seen: Seen) -> _Condition | None:
        # valid readings are finite: equal floats are the same bits, but for the sign of a zero
        value = obs.reading.value
        if value != self.last:  # it moved: held is 0 and frozen_after > 0, so nothing more to ask
            self.last, self.since = value, seen.t
            self.expect = None
            return None
        pressurised = abs(obs.gauge) > self.tolerance
        if seen.opened_now and pressurised and self.expect is None:
            self.expect = seen.t
        venting = seen.vented_since if pressurised else None
        inlet = seen.inlet_open_since
        if inlet is None and venting is None and self.expect is None:  # nothing expects a change: most samples
            return None
        held = seen.t - max(self.since, min(x for x in (inlet, venting, self.expect) if x is not None))
        limit = self.limits.frozen_after
        if not held >= limit:
            return None
        why = ("with the inlet open" if seen.inlet_open_since is not None else
               "with the vent open above the vented baseline" if venting is not None else
               "after a valve opened on a pressurised cell")
        return _Condition(self.kind, f"reading bit-identical ({obs.reading.value!r}) for {held:.3g} s {why}"
                          f" (phase {obs.phase})", held, limit)


class InletLeak(Rule):
    """With the inlet commanded closed and no valve changed for a whole ``closed_inlet_window`` W, the
    pressure rose by more than ``closed_inlet_rise`` over that window (regression slope x W) AND the
    rise is not dying away: the slope over the window's second half is at least ``leak_persist_ratio``
    (0.8) of the first half's.

    Why: after an expansion the cooled gas rewarms and the pressure rises as A(1 - exp(-t/tau)),
    which can exceed the rise limit in one window; its slope decays by exp(-W/(2 tau)) between the
    halves, i.e. below 0.8 for tau < 2.2 W.  A leaking inlet from a supply far above the cell
    pressure feeds a nearly constant flow, so its slope does not decay.  A rewarming slower than
    2.2 W rises by at most A(1 - exp(-W/tau)) < 0.37 A within a window, so it can only trip when its
    whole amplitude exceeds about 2.7 x closed_inlet_rise.  The leak rates caught are those above
    closed_inlet_rise / W (400 Pa/s with the defaults).

    After a fill (the last valve change closed the inlet and nothing else) the persistence test is
    not asked: gas compressed by the fill is warmer than the wall and only cools, so the pressure can
    only fall; a rise of closed_inlet_rise is gas still coming in.  An inlet stuck open near its
    supply pressure rises ever more slowly (an approach to the supply, not a constant flow), which
    the persistence test would excuse as rewarming; here it trips one window after the fill.

    A rewarming slower than about 2.2 W passes the half-window test.  After a vent (the gas expanded
    to ambient is far colder than after an expansion; a large cell whose vent closed on gas still
    cold rewarmed with tau = 30 s at 400 Pa/s), a rise that passes it is confirmed over
    ``LONG_WINDOWS`` W before it trips: the slope over the last W must still be at least
    ``leak_persist_ratio`` of the slope over the W that began (LONG_WINDOWS - 1) W earlier.  A constant
    leak passes that at once; a rewarming decays by exp(-2 W/tau) and is excused up to tau = 9 W
    (45 s with the defaults), at the cost of a leak after a vent being caught 3 W after the vent
    closed, not 1 W.  A rise above ``HUGE_RISE`` times the limit within one W after a vent trips
    without waiting and whether or not it slows: a rewarming that large needs gas some 60 K below the
    wall when the vent shuts, while a small cell behind an inlet stuck open nears its supply within a
    window and slows like a rewarming.
    """

    LONG_WINDOWS = 3
    HUGE_RISE = 10.0

    kind = "inlet_leak"
    fields = ("closed_inlet_rise", "closed_inlet_window")

    @staticmethod
    def armed(seen: Seen) -> bool:
        return not seen.inlet_open  # its window restarts at every valve change anyway

    def __init__(self, limits: Limits, tuning: Tuning) -> None:
        super().__init__(limits, tuning)
        self.persist = tuning.leak_persist_ratio
        self.window: deque[tuple[float, float]] = deque()
        self.long: deque[tuple[float, float]] = deque()  # the last LONG_WINDOWS W, for the confirmation
        self.valve_changes = 0  # the window holds samples since this many valve changes

    def check(self, obs: Observation, seen: Seen) -> _Condition | None:
        if seen.inlet_open:
            return None
        if seen.valve_changes != self.valve_changes:  # a valve moved: judge from that moment on
            self.window.clear()
            self.long.clear()
            self.valve_changes = seen.valve_changes
        t, g = seen.t, float(obs.gauge)
        lim = self.limits
        w = lim.closed_inlet_window
        win = self.window
        win.append((t, g))
        while win and win[0][0] < t - w * (1 + 1e-9):
            win.popleft()
        long = self.long
        if seen.vent_closed_last:  # only then is the longer record asked for
            long.append((t, g))
            while long[0][0] < t - self.LONG_WINDOWS * w * (1 + 1e-9):
                long.popleft()
        if t - seen.valves_changed_at < w * (1 - 1e-9) or len(win) < 6:
            return None
        if win[-1][1] - win[0][1] < 0.5 * lim.closed_inlet_rise:  # cheap pre-check
            return None
        arr = np.array(win)
        ts, ps = arr[:, 0], arr[:, 1]
        rise = _slope(ts, ps) * w
        if not rise > lim.closed_inlet_rise:
            return None
        mid = ts[0] + (ts[-1] - ts[0]) / 2.0
        first = ts <= mid
        if first.sum() < 3 or (~first).sum() < 3:
            return None
        s1 = _slope(ts[first], ps[first])
        s2 = _slope(ts[~first], ps[~first])
        huge_after_vent = seen.vent_closed_last and rise > self.HUGE_RISE * lim.closed_inlet_rise
        if not seen.inlet_closed_last and not huge_after_vent and not (s1 > 0 and s2 >= self.persist * s1):
            return None  # decaying rise: gas rewarming, not a leak (a huge one after a vent cannot be)
        if seen.vent_closed_last and not huge_after_vent:
            span = self.LONG_WINDOWS * w
            if t - seen.valves_changed_at < span * (1 - 1e-9):
                return None  # not yet a long enough record to tell a slow rewarming from a leak
            arr_l = np.array(long)
            early = arr_l[arr_l[:, 0] <= arr_l[0, 0] + w]
            if len(early) >= 3:
                s_early = _slope(early[:, 0], early[:, 1])
                if not (s_early > 0 and _slope(ts, ps) >= self.persist * s_early):
                    return None  # the rise has slowed over several windows: a slow rewarming
        return _Condition(
            self.kind,
            f"pressure rose {rise:.6g} Pa in {w:.3g} s with the inlet commanded closed and no valve change"
            f" (rate {s2:.6g} Pa/s, {'after the fill' if seen.inlet_closed_last else 'not decaying'};"
            f" phase {obs.phase})",
            rise,
            lim.closed_inlet_rise,
        )


class VentTimeout(Rule):
    """The vent commanded open with the inlet closed for ``vent_timeout`` s, and a valid gauge still
    beyond +/-``vent_baseline_tolerance``: a blocked vent or one stuck closed, in any phase.

    Why here and not only in the sequence: the sequence's own vent step has its time-out, but gas
    is also vented by the safe state after a run or a fault, at start-up and between purge pulses;
    pressure that stays trapped behind a vent the operator believes open is the hazard.
    """

    kind = "vent_timeout"
    fields = ("vent_timeout", "vent_baseline_tolerance")

    @staticmethod
    def armed(seen: Seen) -> bool:
        return seen.vented_since is not None

    def check(self, obs: Observation, seen: Seen) -> _Condition | None:
        if seen.vented_since is None or seen.t - seen.vented_since < self.limits.vent_timeout:
            return None
        lim = self.limits
        held = seen.t - seen.vented_since
        g = float(obs.gauge)
        if not (held >= lim.vent_timeout and abs(g) > lim.vent_baseline_tolerance):
            return None
        return _Condition(self.kind, f"vent open for {held:.3g} s and the gauge still at {g:.6g} Pa"
                          f" (tolerance +/-{lim.vent_baseline_tolerance:.6g} Pa, phase {obs.phase})",
                          held, lim.vent_timeout)


#: The order in which the rules are asked; the first to trip on an observation wins.
RULES: tuple[type[Rule], ...] = (InvalidPressurised, Overpressure, Stale, RiseRate, Frozen, InletLeak, VentTimeout)
SAMPLE_KINDS = tuple(r.kind for r in RULES)
#: What a trip's message ends with: the instrument-config keys of the limits its rule read.  Why: a
#: transducer noisier than a limit trips it (2 kPa of noise against the inlet-leak rule's 2 kPa in 5 s
#: tripped at rest, and a reset was refused), and the message named neither key nor file (a sweep)
_LIMIT_KEYS = {r.kind: "; limits: " + ", ".join(f"limits.{f}" for f in r.fields)
               + " in the instrument config (a simulated one's: its simulator config)" for r in RULES}


# -------------------------------------------------------------------------------------- monitor

class InterlockMonitor:
    """Asks the rules in order on every observation; acts, records and latches on a trip."""

    def __init__(
        self,
        limits: Limits,
        roles: ValveRoles,
        act: Callable[[], object],
        on_trip: Callable[[Trip], None] | None = None,
        *,
        rise_samples: int = 3,
        leak_persist_ratio: float = 0.8,
    ) -> None:
        if rise_samples < 2:
            raise ValueError("rise_samples must be >= 2")
        self.limits = limits
        self.roles = roles
        self._inlet, self._vent = roles.inlet, roles.vent  # looked up on every sample
        self._act = act
        self._on_trip = on_trip
        self.tuning = Tuning(rise_samples, leak_persist_ratio)
        self._fresh()
        self._latched: Trip | None = None
        self._index = -1
        self.suppressed: dict[str, int] = {}  # conditions seen while latched, per kind
        self.trips: list[Trip] = []  # every trip raised (not the suppressed repeats)
        self.last_reset_refusal: str | None = None

    def _fresh(self) -> None:
        """New rule memories and a new view (at start and after a reset)."""
        self._seen = Seen()
        self.rules = [cls(self.limits, self.tuning) for cls in RULES]
        self._arm()

    def _arm(self) -> None:
        """The bound checks to ask, in RULES order, for the valves as they are: this loop runs on
        every sample, so it is rebuilt only when the commanded valves change."""
        seen = self._seen
        armed = [r for r in self.rules if r.armed(seen)]
        self._on_valid = tuple(r.check for r in armed if r.sees in ("valid", "both"))
        self._on_invalid = tuple(r.check for r in armed if r.sees in ("invalid", "both"))

    # ------------------------------------------------------------------ state
    @property
    def latched(self) -> Trip | None:
        return self._latched

    @property
    def last_valid_gauge(self) -> float | None:
        return self._seen.last_valid_gauge

    @property
    def sample_count(self) -> int:
        return self._index + 1

    # ------------------------------------------------------------------ public entry points
    def observe(self, obs: Observation) -> Trip | None:
        """Evaluate every rule on one observation; returns a new Trip or None."""
        self._index += 1
        cond = self._evaluate(obs)
        if cond is None:
            return None
        return self._raise(cond, obs.t)

    def trip_external(
        self, kind: str, t: float, message: str, value: float | None = None, limit: float | None = None
    ) -> Trip | None:
        """An engine-detected fault: same order as a sample trip (act, record, latch)."""
        if kind not in EXTERNAL_KINDS:
            raise ValueError(f"unknown external trip kind {kind!r}; expected one of {EXTERNAL_KINDS}")
        return self._raise(_Condition(kind, message, value, limit), t)

    def restore_latch(self, kind: str, t: float, message: str, value: float | None = None,
                      limit: float | None = None) -> Trip:
        """Latch again a trip that was latched before a restart: only an operator reset may clear it.

        Nothing acts here (whoever made this monitor has just asserted the safe state) and nothing is
        recorded as a new trip; ``t`` is a time on this process's clock, so a reset can follow it.
        """
        trip = Trip(kind, float(t), message, value, limit, self._index, None)
        self._latched = trip
        log.error("INTERLOCK %s still latched from before a restart: %s", kind, message)
        return trip

    def reset(self, now_obs: Observation) -> bool:
        """Clear the latch if a fresh observation shows the condition gone. Never restarts anything.

        Needs: a valid, finite reading no older than stale_after; gauge below max_pressure and
        within vent_baseline_tolerance of zero; inlet commanded closed and vent commanded open;
        and no rule tripping on this observation.
        """
        if self._latched is None:
            self.last_reset_refusal = None
            return True
        lim = self.limits
        why = None
        r = now_obs.reading
        g = now_obs.gauge
        if not r.valid or not math.isfinite(g):
            why = f"reading not valid ({r.validity.value})"
        elif now_obs.t - r.t > lim.stale_after:
            why = f"reading is {now_obs.t - r.t:.3g} s old"
        elif now_obs.t < self._latched.t:
            why = "observation older than the trip"
        elif g >= lim.max_pressure:
            why = f"gauge {g:.6g} Pa at or above max_pressure {lim.max_pressure:.6g} Pa"
        elif abs(g) > lim.vent_baseline_tolerance:
            why = f"not vented: gauge {g:.6g} Pa beyond +/-{lim.vent_baseline_tolerance:.6g} Pa"
        elif now_obs.valves.get(self.roles.inlet, True):
            why = "inlet not commanded closed"
        elif not now_obs.valves.get(self.roles.vent, False):
            why = "vent not commanded open"
        if why is not None:
            self.last_reset_refusal = why
            log.info("interlock reset refused: %s", why)
            return False
        # start the rule memories afresh from this observation, then make sure it is clean
        self._fresh()
        cond = self._evaluate(now_obs)  # not counted as a sample: observe() counts samples
        if cond is not None:
            self.last_reset_refusal = f"{cond.kind}: {cond.message}"
            return False
        log.warning("interlock reset by operator (was %s: %s)", self._latched.kind, self._latched.message)
        self._latched = None
        self.last_reset_refusal = None
        return True

    # ------------------------------------------------------------------ acting
    def _raise(self, cond: _Condition, t: float) -> Trip | None:
        ok: bool | None
        try:  # act first
            res = self._act()
            ok = None if res is None else bool(res)
        except Exception as exc:  # the trip must still be recorded and latched
            log.exception("safe state action raised during %s trip", cond.kind)
            ok = False
            cond.message += f" [safe state raised {type(exc).__name__}: {exc}]"
        if self._latched is not None:
            self.suppressed[cond.kind] = self.suppressed.get(cond.kind, 0) + 1
            return None
        if ok is False:
            cond.message += " [safe state NOT confirmed]"
        trip = Trip(cond.kind, float(t), cond.message, cond.value, cond.limit, self._index, ok)
        self._latched = trip
        self.trips.append(trip)
        log.error("INTERLOCK %s at t=%.3f: %s", trip.kind, trip.t, trip.message)
        if self._on_trip is not None:
            try:
                self._on_trip(trip)
            except Exception:
                log.exception("on_trip callback failed for %s", trip.kind)
        return trip

    # ------------------------------------------------------------------ evaluating
    def _evaluate(self, obs: Observation) -> _Condition | None:
        """Update the shared view, then ask the rules in order; the first condition wins."""
        seen = self._seen
        t = seen.t = float(obs.t)
        valves = obs.valves
        seen.opened_now = False
        changed_now = seen.valves != valves
        if changed_now:  # the valve roles' states are looked up only when the valves change
            inlet_open = seen.inlet_open = bool(valves.get(self._inlet, False))
            seen.vent_open = bool(valves.get(self._vent, False))
            if seen.valves is not None:
                before = seen.valves
                seen.opened_now = any(v and not before.get(k, False) for k, v in valves.items())
                changed = {k for k, v in valves.items() if before.get(k) != v}
                seen.inlet_closed_last = changed == {self.roles.inlet} and not inlet_open
                seen.vent_closed_last = self._vent in changed and not seen.vent_open and not inlet_open
            seen.valves_changed_at = t
            seen.valves = dict(valves)  # a copy only when something changed: this runs on every sample
            seen.valve_changes += 1
            # the open-since times move only with the commanded valves
            if inlet_open:
                if seen.inlet_open_since is None:
                    seen.inlet_open_since = t
                seen.vented_since = None
            else:
                seen.inlet_open_since = None
                if not seen.vent_open:
                    seen.vented_since = None
                elif seen.vented_since is None:
                    seen.vented_since = t
            self._arm()
        if seen.t_ref_valid is None:
            seen.t_ref_valid = t  # the stale clock starts with the first observation
        seen.gap = t - seen.t_ref_valid
        if obs.reading.valid and math.isfinite(obs.gauge):
            seen.t_ref_valid = t
            seen.last_valid_gauge = float(obs.gauge)
            checks = self._on_valid
        else:
            checks = self._on_invalid
        for check in checks:
            cond = check(obs, seen)
            if cond is not None:
                cond.message += _LIMIT_KEYS[cond.kind]
                return cond
        return None
