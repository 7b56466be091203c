"""The live view of a run, shared by ``run`` (the controller's events) and ``watch`` (the daemon's).

The view is a pure function of a model that events update: ``LiveModel.apply(kind, data, wall)``
takes the wall-clock time as an argument and ``render``/``frame_line`` read only the model, so the
whole view is tested without a terminal or a clock.

Time left is wall-clock time, estimated from what the run has shown so far: each phase of the run
(purge pulse, vent, zero, fill, settle after fill, expansion, settle after expansion) is expected to
take as long as it took on average in this run, and only before a phase has been seen its static
figure from the sequence (a settle never seen yet is expected to take at least the typical settle
seen so far: a noisy gauge lengthens every settle alike).  Instrument seconds become wall seconds by
the pace seen (one to one on hardware, much faster on the simulator).
"""

from __future__ import annotations

import statistics
from collections import deque
from dataclasses import dataclass, field
from typing import Any

from pycnoctl.controller.cli.display import Units
from pycnoctl.controller.domain.states import RunState

SETTLES = ("baseline", "settle_filled", "settle_expanded")
SPARK = "▁▂▃▄▅▆▇█"
SPARK_POINTS = 40
SPARK_SPACING_S = 1.0  # instrument seconds between sparkline points (a 40 s window)
SPARK_MIN_SPAN = 500.0  # Pa: a settled gauge's noise draws as a flat line, not as full-height bars


@dataclass
class Plan:
    """The phases a run will go through, in order, and each one's static duration (instrument s)."""

    name: str
    kind: str
    cycles: int
    discard: int = 0
    converge_last: int | None = None
    converge_within: float | None = None
    timeline: list[str] = field(default_factory=list)
    static: dict[str, float] = field(default_factory=dict)
    lead: int = 0  # phases before the first cycle (the purge pulses)
    rules_known: bool = True  # False when only the daemon's brief is known (no discard or convergence rule)
    per_cycle: int = 6  # phases of one cycle
    stop_on_converge: bool = False  # the run may end once converged: discard + converge_last cycles at least

    def cycle_start(self, cycle: int) -> int:
        """Index in the timeline of the first phase of this cycle (1-based)."""
        return min(self.lead + max(cycle - 1, 0) * self.per_cycle, max(len(self.timeline) - 1, 0))

    @classmethod
    def from_sequence(cls, seq: Any) -> Plan:
        from pycnoctl.controller.run.sequence import phase_times

        static = phase_times(seq)
        timeline: list[str] = []
        if seq.purge is not None:
            timeline += ["purge_fill", "purge_hold", "purge_vent"] * seq.purge.pulses
        lead = len(timeline)
        cycles = seq.cycles.count if seq.expands else (1 if seq.kind == "leak_check" else 0)
        per_cycle = (["vent", "baseline", "fill", "settle_filled", "expand", "settle_expanded"] if seq.expands
                     else ["vent", "baseline", "fill", "settle_filled", "leak_hold"])
        timeline += per_cycle * cycles + ["vent"]
        conv = seq.cycles.converge if seq.expands else None
        return cls(seq.name, seq.kind, seq.cycles.count if seq.expands else 0,
                   seq.cycles.discard if seq.expands else 0, conv.last if conv else None,
                   conv.within if conv else None, timeline, static, lead, len(per_cycle),
                   stop_on_converge=bool(conv and seq.kind == "measure" and seq.cycles.stop_on_converge))

    def earliest_end(self, cycle: int) -> int:
        """Index in the timeline of the final vent if the run stops as soon as it may (the last index
        when it cannot stop early): the cycles it must run, or the current one if later."""
        last = len(self.timeline) - 1
        if not (self.stop_on_converge and self.converge_last):
            return last
        need = max(self.discard + self.converge_last, cycle)
        return min(self.lead + need * self.per_cycle, last)

    @classmethod
    def from_brief(cls, brief: dict[str, Any]) -> Plan:
        """What the daemon says when a run starts (name, kind, cycles, static estimate): each phase of the
        usual cycle gets an even share of the estimate until the run shows its own pace."""
        n = int(brief.get("cycles_total") or 0)
        timeline = ["vent", "baseline", "fill", "settle_filled", "expand", "settle_expanded"] * n + ["vent"]
        each = float(brief.get("expected_s") or 0.0) / max(len(timeline), 1)
        return cls(str(brief.get("sequence") or "?"), str(brief.get("kind") or "measure"), n,
                   int(brief.get("discard") or 0), timeline=timeline, static=dict.fromkeys(timeline, each),
                   rules_known=False)


@dataclass
class CycleRow:
    index: int
    p1: float | None
    p2: float | None
    volume_cm3: float | None
    u_cm3: float | None
    kept: bool
    flags: list[str]


@dataclass
class LiveModel:
    """Everything the live view shows, updated from events (kinds and fields of the controller's
    listener and of the daemon's event stream alike)."""

    plan: Plan
    run_id: str = ""
    state: str = "idle"
    cycle: int = 0
    gauge: float | None = None
    t: float | None = None  # instrument time of the last sample
    t_first: float | None = None  # instrument time the run began (the first sample, or as the daemon says)
    t_seen0: float | None = None  # the first sample this view saw, and the wall time then (for the pace)
    wall_seen0: float | None = None
    wall: float | None = None
    state_t: float | None = None  # instrument time the current state began
    pos: int = -1  # index in plan.timeline
    seen: dict[str, list[float]] = field(default_factory=dict)  # phase -> durations seen (instrument s)
    spark: deque[float] = field(default_factory=lambda: deque(maxlen=SPARK_POINTS))
    spark_t: float | None = None
    cycles: list[CycleRow] = field(default_factory=list)
    messages: list[str] = field(default_factory=list)
    finished: str | None = None  # status once the run ended
    simulated: bool = False

    # ------------------------------------------------------------------------------- updates
    def apply(self, kind: str, data: dict[str, Any], wall: float) -> None:
        if kind == "sample":
            self._sample(data, wall)
        elif kind == "state":
            self._state(str(data.get("state")), data.get("t"))
        elif kind == "cycle":
            self.cycle = int(data.get("cycle") or self.cycle)
        elif kind == "cycle_done":
            self._cycle_done(data)
        elif kind == "trip":
            self._say(f"INTERLOCK {data.get('interlock')}: {data.get('message')}")
        elif kind == "warning":
            self._say(f"warning: {data.get('message')}")
        elif kind == "run_finished":
            self.finished = str(data.get("status") or "ended")
            if data.get("message"):
                self._say(str(data["message"]))

    def _say(self, text: str) -> None:
        self.messages = [*self.messages[-2:], text]

    def _sample(self, data: dict[str, Any], wall: float) -> None:
        g = data.get("gauge_pa", data.get("gauge"))
        self.gauge = float(g) if isinstance(g, (int, float)) and g == g else None
        t = data.get("t")
        if isinstance(t, (int, float)):
            self.t = float(t)
            if self.t_first is None:
                self.t_first = self.t
            if self.t_seen0 is None:
                self.t_seen0, self.wall_seen0 = self.t, wall
            if self.gauge is not None and (self.spark_t is None or self.t - self.spark_t >= SPARK_SPACING_S):
                self.spark.append(self.gauge)
                self.spark_t = self.t
        self.wall = wall
        st = data.get("state")
        if isinstance(st, str) and st != self.state:
            self._state(st, self.t)

    def _state(self, state: str, t: Any) -> None:
        if state == self.state:
            return
        now = float(t) if isinstance(t, (int, float)) else self.t
        if now is not None and (self.t is None or now > self.t):
            self.t = now  # a state event carries the time of the sample that caused it
            self.t_first = now if self.t_first is None else self.t_first
        if self.state_t is not None and now is not None and 0 <= self.pos < len(self.plan.timeline):
            self.seen.setdefault(self.plan.timeline[self.pos], []).append(now - self.state_t)
        self.state, self.state_t = state, now
        tl = self.plan.timeline
        # joined mid-run (watch): the cycle number says where in the timeline to look
        after = self.pos if self.pos >= 0 or not self.cycle else self.plan.cycle_start(self.cycle) - 1
        nxt = next((i for i in range(max(after, 0), len(tl)) if tl[i] == state and i > after), None)
        if nxt is not None:
            self.pos = nxt
        if state in (RunState.DONE, RunState.FAULT, RunState.ABORTED):
            self.pos = len(tl)

    def _cycle_done(self, data: dict[str, Any]) -> None:
        r = data.get("result") or data
        idx = int(r.get("index") or data.get("cycle") or len(self.cycles) + 1)
        vol = r.get("volume_cm3")
        if vol is None and isinstance(r.get("volume_m3"), (int, float)):
            vol = r["volume_m3"] * 1e6
        u = r.get("u_volume_cm3")
        if u is None and isinstance(r.get("u_volume_m3"), (int, float)):
            u = r["u_volume_m3"] * 1e6
        out = set(data.get("left_out") or ())
        for c in self.cycles:
            if c.index in out:
                c.kept = False
        self.cycles.append(CycleRow(idx, r.get("p1_gauge_pa"), r.get("p2_gauge_pa"), vol, u,
                                    bool(r.get("kept")), list(r.get("flags") or [])))

    # ------------------------------------------------------------------------------- derived
    def _in_phase(self) -> float:
        return max(self.t - self.state_t, 0.0) if self.t is not None and self.state_t is not None else 0.0

    def _base(self, phase: str) -> float:
        """A phase's expected duration from the phases already finished (instrument s)."""
        seen = self.seen.get(phase)
        if seen:
            return _mean(seen)
        static = self.plan.static.get(phase, 0.0)
        others = [d for p in SETTLES for d in self.seen.get(p, [])] if phase in SETTLES else []
        return max(static, statistics.median(others)) if others else static

    def expected(self, phase: str) -> float:
        """How long a later instance of a phase is expected to take: the current one, running longer than
        expected, is a lower bound for the next."""
        base = self._base(phase)
        return max(base, self._in_phase()) if phase == self._current_phase() else base

    def _current_phase(self) -> str | None:
        tl = self.plan.timeline
        return tl[self.pos] if 0 <= self.pos < len(tl) else None

    def elapsed(self) -> float:
        return (self.t - self.t_first) if self.t is not None and self.t_first is not None else 0.0

    def left_instrument_s(self) -> float | None:
        """Instrument seconds left, or None before the run has begun or after it ended."""
        tl = self.plan.timeline
        if self.pos < 0 or self.pos >= len(tl) or self.finished:
            return None
        left = max(self._base(tl[self.pos]) - self._in_phase(), 0.0)
        # a run that stops once converged is expected to converge at its first chance: the estimate
        # grows by a cycle each time it does not (the final vent is the last phase either way)
        end = max(self.plan.earliest_end(self.cycle), self.pos)
        rest = tl[self.pos + 1:end] + ([tl[-1]] if end > self.pos else [])
        return left + sum(self.expected(p) for p in rest)

    def pace(self) -> float:
        """Wall seconds per instrument second, as seen (1 before there is enough to tell)."""
        if self.t is None or self.t_seen0 is None or self.wall is None or self.wall_seen0 is None:
            return 1.0
        seen = self.t - self.t_seen0
        return max(self.wall - self.wall_seen0, 0.0) / seen if seen >= 2.0 else 1.0

    def left_wall_s(self) -> float | None:
        left = self.left_instrument_s()
        return None if left is None else left * self.pace()

    def fraction(self) -> float:
        if self.finished or self.state in (RunState.DONE,):
            return 1.0
        left = self.left_instrument_s()
        el = self.elapsed()
        if left is None or el + left <= 0:
            return 0.0
        return el / (el + left)

    def convergence(self) -> str:
        """The convergence of the kept cycles so far, in words."""
        kept = [c.volume_cm3 for c in self.cycles if c.kept and c.volume_cm3 is not None]
        last, within = self.plan.converge_last, self.plan.converge_within
        if not self.plan.cycles:
            return ""
        if not self.plan.rules_known:
            return f"{len(kept)} cycle(s) kept so far (convergence is judged when the run ends)"
        if last is None or within is None:
            return f"{len(kept)} cycle(s) kept so far (the sequence sets no convergence rule)"
        if len(kept) < last:
            return f"not judged yet: needs {last} kept cycles, has {len(kept)}"
        from pycnoctl.controller.maths.stats import converged

        tail = kept[-last:]
        mean = sum(tail) / len(tail)
        spread = max(abs(v - mean) for v in tail) / abs(mean) if mean else float("inf")
        ok = converged(kept, last_k=last, within_fraction=within)
        verdict = "converged" if ok else "not converged yet"
        return f"{verdict}: last {last} kept within {spread * 100:.3g} % of their mean (limit {within * 100:g} %)"


def _mean(xs: list[float]) -> float:
    return sum(xs) / len(xs) if xs else 0.0


def duration(s: float | None) -> str:
    """Seconds for people: '45 s', '7 min 05 s', '1 h 16 min'."""
    if s is None:
        return "-"
    if s < 1.0:
        return "under 1 s"
    s = round(s)
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    if h:
        return f"{h} h {m:02d} min"
    return f"{m} min {sec:02d} s" if m else f"{sec} s"


def sparkline(values: list[float]) -> str:
    if not values:
        return ""
    lo, hi = min(values), max(values)
    span = max(hi - lo, SPARK_MIN_SPAN)
    return "".join(SPARK[min(int((v - lo) / span * len(SPARK)), len(SPARK) - 1)] for v in values)


def label(state: str) -> str:
    try:
        return RunState(state).look.label
    except ValueError:
        return state


# the phases of one cycle as the phase strip names them (state -> short word)
STRIP: list[tuple[str, str]] = [("vent", "vent"), ("baseline", "zero"), ("fill", "fill"), ("settle_filled", "P1"),
                                ("expand", "expand"), ("settle_expanded", "P2")]
LEAK_STRIP: list[tuple[str, str]] = [*STRIP[:4], ("leak_hold", "hold")]


def phase_strip(m: LiveModel) -> Any:
    """The cycle's phases in order, the current one bracketed and bold (the purge as one word before them)."""
    from rich.text import Text

    strip = LEAK_STRIP if m.plan.kind == "leak_check" else STRIP
    words = [("purge", "purge"), *strip] if m.plan.lead else list(strip)
    purging = m.state.startswith("purge")
    out = Text()
    for i, (state, word) in enumerate(words):
        if i:
            out.append(" > ", style="dim")
        current = state == m.state or (state == "purge" and purging)
        out.append(f"[{word}]" if current else word, style="bold reverse" if current else "dim")
    return out


def status_words(m: LiveModel) -> str:
    """State, cycle and phase in one phrase."""
    text = label(m.state)
    if m.plan.cycles and m.cycle:
        text = f"cycle {m.cycle} of {m.plan.cycles}: {text}"
    return text


def time_left_words(m: LiveModel) -> str:
    left = m.left_wall_s()
    if m.finished or m.state in ("done", "fault", "aborted"):
        return f"ended ({m.finished or label(m.state)}) after {duration(m.elapsed() * m.pace())}"
    if left is None:
        if RunState(m.state).purging if m.state in RunState._value2member_map_ else False:
            return "purging (time left once the cycles begin)"
        return "starting"
    measured = bool(m.seen)
    words = "under 1 s left" if left < 1.0 else f"about {duration(left)} left"
    return words + ("" if measured else " (static estimate until a phase is seen)")


def render(m: LiveModel, units: Units) -> Any:
    """The live view as a rich renderable (a pure function of the model)."""
    from rich.console import Group
    from rich.progress_bar import ProgressBar
    from rich.table import Table
    from rich.text import Text

    head = Table.grid(padding=(0, 1))
    head.add_column(style="bold", no_wrap=True)
    head.add_column()
    title = m.plan.name + (f" ({m.plan.kind})" if m.plan.kind else "") + (f"  run {m.run_id}" if m.run_id else "")
    head.add_row("run", title + ("  [SIMULATED]" if m.simulated else ""))
    head.add_row("state", status_words(m))
    if m.plan.timeline:
        head.add_row("phase", phase_strip(m))
    p = f"{units.p(m.gauge)} {units.p_label}" if m.gauge is not None else "no valid reading"
    head.add_row("pressure", Text(f"{p}  {sparkline(list(m.spark))}"))
    if m.plan.cycles:
        head.add_row("converge", m.convergence())
    bar = Table.grid(padding=(0, 1))
    bar.add_column(no_wrap=True)
    bar.add_column(no_wrap=True)
    bar.add_row(ProgressBar(total=1.0, completed=m.fraction(), width=30),
                f"{m.fraction() * 100:3.0f} %  {time_left_words(m)}")
    parts: list[Any] = [head, bar]
    if m.cycles:
        t = Table(box=None, padding=(0, 1), header_style="bold")
        for col in ("cycle", f"P1 / {units.p_label}", f"P2 / {units.p_label}", "volume / cm3", "u / cm3", "kept"):
            t.add_column(col, justify="right", no_wrap=True)
        for c in m.cycles[-8:]:
            t.add_row(str(c.index), units.p(c.p1), units.p(c.p2), _f(c.volume_cm3), _f(c.u_cm3),
                      ("yes" if c.kept else "no") + (f" ({', '.join(c.flags)})" if c.flags else ""))
        parts.append(t)
        if len(m.cycles) > 8:
            parts.append(Text(f"({len(m.cycles) - 8} earlier cycle(s) above; u is standard, k = 1)"))
        else:
            parts.append(Text("u is the standard uncertainty of each cycle (k = 1)"))
    parts += [Text(msg) for msg in m.messages]
    return Group(*parts)


def frame_line(m: LiveModel, units: Units) -> str:
    """One plain line for a log or a pipe: state, pressure, progress and time left."""
    p = f"{units.p(m.gauge)} {units.p_label}" if m.gauge is not None else "no valid reading"
    run = f"{m.run_id} " if m.run_id else ""
    return f"{run}{status_words(m)} | {p} | {m.fraction() * 100:.0f} % | {time_left_words(m)}"


def cycle_line(c: CycleRow, units: Units) -> str:
    flags = f" ({', '.join(c.flags)})" if c.flags else ""
    return (f"cycle {c.index}: P1 {units.p(c.p1)} P2 {units.p(c.p2)} {units.p_label}, volume "
            f"{_f(c.volume_cm3)} cm3, u {_f(c.u_cm3)} cm3 (standard), {'kept' if c.kept else 'not kept'}{flags}")


def _f(x: float | None, digits: int = 5) -> str:
    return "-" if x is None else f"{x:.{digits}f}"


class LiveScreen:
    """The model drawn on a terminal with rich.Live, at most ``fps`` times a second (events may come
    thousands of times a second from the simulator)."""

    def __init__(self, model: LiveModel, units: Units, con: Any, fps: float = 8.0) -> None:
        self.model, self.units, self.con = model, units, con
        self._period = 1.0 / fps
        self._next = 0.0
        self._live: Any = None

    def start(self) -> None:
        from rich.live import Live

        self._live = Live(render(self.model, self.units), console=self.con, refresh_per_second=8, transient=True)
        self._live.start()

    def stop(self) -> None:
        if self._live is not None:
            self._live.stop()
            self._live = None

    def on_event(self, kind: str, data: dict[str, Any]) -> None:
        import time

        now = time.monotonic()
        self.model.apply(kind, data, now)
        if self._live is not None and (now >= self._next or kind != "sample"):
            self._next = now + self._period
            self._live.update(render(self.model, self.units))
