"""Software interlocks: a second layer behind the hardware relief valve, never the protection.

The engine calls ``InterlockMonitor.observe`` on every pressure sample (also while idle), in
the acquisition path, before any sequence logic.  A trip acts first (``act()``: the engine
binds it to ``Instrument.safe_state``), then records why (``on_trip`` and the log), then
returns the Trip for the state machine.  Trips latch; ``reset`` clears only on a fresh
observation that shows the condition gone (valid reading, below limits, vented), and never
restarts anything.

Rules (kind: condition), evaluated per observation:

* ``overpressure``: a valid gauge pressure above ``limits.max_pressure``; the first such sample trips.
* ``rise_rate``: least-squares dP/dt over the last ``rise_samples`` valid samples above
  ``limits.max_rise_rate``.
* ``invalid_pressurised``: an invalid reading (any non-VALID flag, or a non-finite gauge value)
  while pressurised: last valid gauge above ``limits.invalid_trip_pressure``, or the inlet
  commanded open.  Invalid readings never enter any calculation.
* ``stale``: more than ``limits.stale_after`` s since the last valid sample, in any phase.
  The engine must observe every tick, passing an invalid TIMEOUT reading when the sensor gave
  nothing; a valid sample that ends a longer gap also trips (the loop itself stalled).
* ``frozen``: the raw reading bit-identical for ``limits.frozen_after`` s while the inlet is open.
* ``inlet_leak``: with the inlet commanded closed and no valve changed for a whole
  ``limits.closed_inlet_window`` W, the pressure rose by more than ``limits.closed_inlet_rise``
  over that window (regression slope x W) AND the rise is not dying away: the slope over the
  window's second half is at least ``leak_persist_ratio`` (0.8) of the first half's.
  Why: after an expansion the cooled gas rewarms and the pressure rises as A(1 - exp(-t/tau)),
  which can exceed the rise limit in one window; its slope decays by exp(-W/(2 tau)) between
  the halves, i.e. below 0.8 for tau < 2.2 W.  A leaking inlet from a supply far above the
  cell pressure feeds a nearly constant flow, so its slope does not decay.  A rewarming slower
  than 2.2 W rises by at most A(1 - exp(-W/tau)) < 0.37 A within a window, so it can only trip
  when its whole amplitude exceeds about 2.7 x closed_inlet_rise.  The leak rates caught are
  those above closed_inlet_rise / W (400 Pa/s with the defaults).

Engine-raised kinds go through ``trip_external`` with the same order: fill_timeout,
vent_timeout, valve_command_failed, device_error, exception, write_error.
"""

from __future__ import annotations

import logging
import math
import struct
from collections import deque
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field

import numpy as np

from pycnoctl.controller.domain.devices import Reading
from pycnoctl.controller.domain.gaspath import Limits, ValveRoles

log = logging.getLogger(__name__)

OVERPRESSURE = "overpressure"
RISE_RATE = "rise_rate"
INVALID_PRESSURISED = "invalid_pressurised"
STALE = "stale"
FROZEN = "frozen"
INLET_LEAK = "inlet_leak"
SAMPLE_KINDS = (OVERPRESSURE, RISE_RATE, INVALID_PRESSURISED, STALE, FROZEN, INLET_LEAK)
EXTERNAL_KINDS = (
    "fill_timeout",
    "vent_timeout",
    "settle_timeout",
    "valve_command_failed",
    "device_error",
    "exception",
    "write_error",
)


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


def _bits(x: float) -> bytes:
    return struct.pack("<d", x)


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


@dataclass
class _History:
    """What the rules remember between samples (cleared by a reset)."""

    rise: deque[tuple[float, float]] = field(default_factory=deque)
    leak: deque[tuple[float, float]] = field(default_factory=deque)
    t_ref_valid: float | None = None  # last valid sample time (or the start reference)
    last_valid_gauge: float | None = None
    frozen_bits: bytes | None = None
    frozen_since: float = math.nan
    inlet_open_since: float | None = None
    valves: dict[str, bool] | None = None
    valves_changed_at: float = -math.inf


class InterlockMonitor:
    """Evaluates the interlock rules per observation; acts, records and latches on a trip."""

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
        self._act = act
        self._on_trip = on_trip
        self.rise_samples = rise_samples
        self.leak_persist_ratio = leak_persist_ratio
        self._h = _History()
        self._latched: Trip | None = None
        self._index = -1
        self.suppressed: dict[str, int] = {}  # conditions seen while latched, per kind
        self.trips: list[Trip] = []  # every trip raised (not the suppressed repeats)
        self.last_reset_refusal: str | None = None

    # ------------------------------------------------------------------ state
    @property
    def latched(self) -> Trip | None:
        return self._latched

    @property
    def last_valid_gauge(self) -> float | None:
        return self._h.last_valid_gauge

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
        self._h = _History()
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

    # ------------------------------------------------------------------ rules
    def _evaluate(self, obs: Observation) -> _Condition | None:
        h = self._h
        lim = self.limits
        t = float(obs.t)
        valves = obs.valves
        inlet_open = bool(valves.get(self.roles.inlet, False))

        if h.valves != valves:
            h.valves_changed_at = t
            h.valves = dict(valves)  # a copy only when something changed: this runs on every sample
            h.leak.clear()
        if inlet_open:
            if h.inlet_open_since is None:
                h.inlet_open_since = t
        else:
            h.inlet_open_since = None
        if h.t_ref_valid is None:
            h.t_ref_valid = t  # the stale clock starts with the first observation

        valid = obs.reading.valid and math.isfinite(obs.gauge)
        gap = t - h.t_ref_valid
        if not valid:
            pressurised = inlet_open or (
                h.last_valid_gauge is not None and h.last_valid_gauge > lim.invalid_trip_pressure
            )
            if pressurised:
                last = "none" if h.last_valid_gauge is None else f"{h.last_valid_gauge:.6g} Pa"
                flag = obs.reading.validity.value
                if obs.reading.detail:
                    flag += f": {obs.reading.detail}"
                return _Condition(
                    INVALID_PRESSURISED,
                    f"invalid reading ({flag}) while pressurised (last valid gauge {last},"
                    f" inlet {'open' if inlet_open else 'closed'}, phase {obs.phase})",
                    h.last_valid_gauge,
                    lim.invalid_trip_pressure,
                )
            if gap > lim.stale_after:
                return self._stale(gap, obs)
            return None

        g = float(obs.gauge)
        h.t_ref_valid = t
        h.last_valid_gauge = g
        if g > lim.max_pressure:
            return _Condition(
                OVERPRESSURE,
                f"gauge {g:.6g} Pa above max_pressure {lim.max_pressure:.6g} Pa (phase {obs.phase})",
                g,
                lim.max_pressure,
            )
        if gap > lim.stale_after:
            return self._stale(gap, obs)

        h.rise.append((t, g))
        while len(h.rise) > self.rise_samples:
            h.rise.popleft()
        if len(h.rise) == self.rise_samples:
            rate = _slope_pairs(h.rise)
            if math.isfinite(rate) and rate > lim.max_rise_rate:
                return _Condition(
                    RISE_RATE,
                    f"pressure rising at {rate:.6g} Pa/s over {self.rise_samples} samples,"
                    f" limit {lim.max_rise_rate:.6g} Pa/s (phase {obs.phase})",
                    rate,
                    lim.max_rise_rate,
                )

        bits = _bits(float(obs.reading.value))
        if bits != h.frozen_bits:
            h.frozen_bits = bits
            h.frozen_since = t
        if h.inlet_open_since is not None:
            held = t - max(h.frozen_since, h.inlet_open_since)
            if held >= lim.frozen_after:
                return _Condition(
                    FROZEN,
                    f"reading bit-identical ({obs.reading.value!r}) for {held:.3g} s with the inlet open",
                    held,
                    lim.frozen_after,
                )

        if not inlet_open:
            return self._leak_rule(t, g)
        return None

    def _stale(self, gap: float, obs: Observation) -> _Condition:
        return _Condition(
            STALE,
            f"no valid pressure sample for {gap:.3g} s"
            f" (limit {self.limits.stale_after:.3g} s, phase {obs.phase})",
            gap,
            self.limits.stale_after,
        )

    def _leak_rule(self, t: float, g: float) -> _Condition | None:
        h = self._h
        lim = self.limits
        w = lim.closed_inlet_window
        h.leak.append((t, g))
        while h.leak and h.leak[0][0] < t - w * (1 + 1e-9):
            h.leak.popleft()
        if t - h.valves_changed_at < w * (1 - 1e-9) or len(h.leak) < 6:
            return None
        if h.leak[-1][1] - h.leak[0][1] < 0.5 * lim.closed_inlet_rise:  # cheap pre-check
            return None
        arr = np.array(h.leak)
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
        if not (s1 > 0 and s2 >= self.leak_persist_ratio * s1):
            return None  # decaying rise: gas rewarming, not a leak
        return _Condition(
            INLET_LEAK,
            f"pressure rose {rise:.6g} Pa in {w:.3g} s with the inlet commanded closed and no valve change"
            f" (rate {s2:.6g} Pa/s, not decaying)",
            rise,
            lim.closed_inlet_rise,
        )
