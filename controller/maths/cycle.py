"""The cycle measurer: the one place a cycle's zero, P1 and P2 are taken from samples.

It is fed (state, row) pairs, one per recorded sample, in order. The live engine feeds it every
sample it steps on and acts on what it answers (a settle decided ends the state); ``pycnoctl analyze``
feeds it the stored trace, row by row, with the states the trace recorded. Same rows, same object,
same numbers: replay cannot drift from the live run because there is no second copy of the rules.

A phase starts at the time of the row before its first one (the sample on which the engine changed
state), which is the engine's own start time of the state. A settle that the live engine gave up on
(time limit, ``on_timeout: accept``) shows in the trace as a phase that ended undecided; both sides
then take the detector's estimate so far and flag the cycle. A cycle is complete when its P2 phase
is followed by the vent (a fault or an abort cuts it short). Pure code: no I/O, no clock.
"""

from __future__ import annotations

import functools
import itertools
import math
from collections import deque
from dataclasses import dataclass, field, replace

import numpy as np

from pycnoctl.controller.domain.gas import UnknownGas, get_gas
from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.domain.states import RunState
from pycnoctl.controller.maths import results
from pycnoctl.controller.maths.settle import (
    ExpFit,
    SettleCriteria,
    SettleDetector,
    SettleStatus,
    block_means,
    fit_exponential_detail,
)

_LAST = 20  # samples averaged for the ambient pressure of a settled value (the temperature: the wall line)
# s: under a gauge transducer a settle follows the lab by a straight line through its readings over
# the last LAB_SPAN (the lab changes over minutes; one reading carries its noise), once they span
# LAB_LINE_FROM; before that, by their mean (see SlidingLine)
LAB_SPAN = 30.0
LAB_LINE_FROM = 10.0
# s: what the settle detector sees follows the lab by a second line, through the last LAB_FRAME_SPAN
# of the same readings. Why two: a line's newest end wanders with the readings' noise (2 Pa readings
# once a second: 0.73 Pa over 30 s) and tilts a 10 s window's slope by 0.1 Pa/s (measured), which a
# quiet transducer's settles took for relaxation still under way and never decided. The detector needs
# only the lab's changes, which the longer line follows as well (a steady change without lag; a
# 20-minute barometric wave's curvature as a near-constant offset) at a quarter of the tilt; the
# settled value is still taken against the shorter line, whose newest end lags the lab least.
LAB_FRAME_SPAN = 120.0
# s: a settle follows the wall temperature (the thermometer) by a line through the last WALL_SPAN of
# its readings: a wall changes over many minutes, and a shorter line's slope wanders by 0.1 Pa/s of
# P1 with 0.01 K of thermometer noise
WALL_SPAN = 120.0
#: a settle follows the wall only once the line's slope is this many standard errors from zero (tested
#: at its first sample and once a second after): a line through a noisy or coarse thermometer wanders
#: by far more than a steady wall moves, and a frame that follows the wander shows the detector a
#: drift that is not the gas's (a nitrogen bench with a 1 Hz, 0.03 K thermometer never settled its
#: empty cell in 600 s)
WALL_SLOPE_Z = 3.0
LAB_READ_EVERY = 1.0  # s between barometer readings (the controller reads it once a second)
#: s: a settled P1 or P2 takes a temperature only where the thermometer gave a valid reading this recently
#: before it (a zero takes its last rows' readings, which are as recent); a thermometer read once a second
#: is well inside it, one that stopped answering is not
TEMPERATURE_RECENT = 5.0


@dataclass(slots=True)  # made on every tick: slots, not frozen (a frozen __init__ is markedly slower)
class Row:
    """One sample as the measurer needs it; NaN where the reading was invalid."""

    t: float  # s, instrument time
    gauge: float  # Pa above the ambient reference
    ambient: float  # Pa absolute
    temp_k: float  # K


@dataclass(frozen=True)
class Zero:
    """A cycle's zero: the settled gauge reading of the closed, vented system, and its conditions."""

    value: float  # Pa
    u: float  # Pa, standard: the settle window's regression (random from cycle to cycle)
    ambient: float  # Pa absolute
    temp_k: float  # K of the gas trapped at the zero (NaN when no valid temperature)
    u_relax: float = 0.0  # Pa, standard: relaxation still to come (the same sign every cycle)
    n_temps: int = 0  # distinct thermometer readings averaged into temp_k
    t_at: float = math.nan  # s, when it was taken


@dataclass
class CycleData:
    """What one cycle has measured so far, under the names its CycleResult (and summary.json) uses:
    gauge pressures above the cycle's zero, SI units.

    Each settled pressure carries two standard uncertainties, kept apart because they behave
    differently over a run: ``u_*_settle_pa`` is the settle window regression's (the transducer's
    white noise is in it; it changes from cycle to cycle and averages down) and ``u_*_relax_pa`` is
    the relaxation the settle left to come (the same sign in every cycle; it does not average).
    ``n_t*`` count the distinct thermometer readings averaged into each temperature."""

    index: int
    volume_name: str
    baseline_pa: float = math.nan  # the cycle's zero
    u_baseline_pa: float = math.nan
    u_baseline_relax_pa: float = 0.0
    ambient_pa: float = math.nan  # absolute, at the zero
    ta_k: float = math.nan  # gas temperature at the zero
    n_ta: int = 0
    p1_gauge_pa: float = math.nan
    u_p1_settle_pa: float = math.nan
    u_p1_relax_pa: float = 0.0
    t1_k: float = math.nan
    n_t1: int = 0
    settle1_s: float = math.nan
    drift1_pa_s: float = math.nan
    p2_gauge_pa: float = math.nan
    u_p2_settle_pa: float = math.nan
    u_p2_relax_pa: float = 0.0
    t2_k: float = math.nan
    n_t2: int = 0
    settle2_s: float = math.nan
    r_t1_t2: float = 0.0  # correlations of the temperatures' errors (lines sharing readings)
    r_t1_ta: float = 0.0
    r_t2_ta: float = 0.0
    drift2_pa_s: float = math.nan
    fill_s: float = math.nan  # set by the engine: when its fill target was reached
    ambient1_pa: float = math.nan  # lab pressure (absolute) over P1's last samples, and P2's
    ambient2_pa: float = math.nan
    since_zero1_s: float = math.nan  # s from the zero to P1, and to P2
    since_zero2_s: float = math.nan
    leak_rate_pa_s: float = math.nan
    flags: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class Settled:
    """A settle phase's outcome: the pressure above the zero (P1, P2) or the zero itself (baseline)."""

    p: float
    u: float  # Pa, standard: the window regression's (random)
    t: float  # K, mean gas temperature over the last samples
    time: float  # s the settle took
    drift: float  # Pa/s at the decision
    u_relax: float = 0.0  # Pa, standard: relaxation still to come (systematic)
    n_temps: int = 0  # distinct thermometer readings in t
    ambient: float = math.nan  # Pa absolute, lab pressure over the last samples
    t_at: float = math.nan  # s, when it was taken
    window: float = math.nan  # s, the regression window the decision used (longer than stated where noise needs it)
    model: str = ""  # what decided it (settle_model): the record says on what a value was taken


@dataclass(frozen=True)
class CyclePlan:
    """Everything the measurer needs besides the rows: the settle rules and the volume inputs."""

    baseline: SettleCriteria
    filled: SettleCriteria
    expanded: SettleCriteria
    chambers: ChamberCalibration
    gas: str
    u_p: float  # Pa, standard uncertainty of one pressure reading (its noise: the settle rules' unit)
    u_t: float  # K, standard uncertainty of one temperature reading (its noise)
    discard: int  # leading cycles not kept
    volume_name: str = ""
    #: Pa, the transducer's systematic standard uncertainty at a reading (non-linearity: a gain error
    #: cancels in the pressure ratio and the zero is taken every cycle); the same in every cycle.
    u_p_sys: float = 0.0
    ambient: AmbientModel | None = None  # how the lab pressure is known; None: constant, unbudgeted
    #: the instrument reads a thermometer: a cycle that got no temperature for its zero, P1 or P2 (the
    #: thermometer stopped answering) is left out, not computed as if the gas kept one temperature
    thermometer: bool = False


@dataclass(frozen=True)
class AmbientModel:
    """How a run knows the lab pressure between a cycle's zero and its P1, P2.

    Why it matters: a gauge transducer reads against the lab's pressure, and the gas trapped in the
    expansion volume at the zero stays at the zero's lab pressure; a change of the lab pressure by
    dPa between the zero and P2 moves P2 - Pa by dPa, a relative error of dPa / P2g (10 Pa on a
    50 kPa expansion: 2e-4).  With a barometer the change is read and corrected; without one it is
    bounded by ``drift_rate`` (Pa/s) over the time since the zero and budgeted."""

    barometer: bool
    u_barometer: float = 0.0  # Pa, one barometer reading's noise (its means average it down)
    drift_rate: float = 0.0  # Pa/s, the largest lab-pressure change rate assumed without a barometer
    reads_gauge: bool = True  # the transducer reads against the lab (False: absolute, gauge = abs - lab)

    @property
    def follows_lab(self) -> bool:
        """True when the settle detector should see the closed cell's own pressure, not the gauge
        reading: a read lab pressure moves a gauge reading (or an absolute reading less the lab) while
        the closed gas stays put, and the detector took a 20 Pa barometric wave over a settle for a
        relaxation still under way."""
        return self.barometer or not self.reads_gauge

    @property
    def u_followed(self) -> float | None:
        """Pa, standard: the lab pressure's error in a settled value where the settle follows the lab
        (None where it does not). An absolute transducer's value is its own reading: none. Under a gauge
        transducer, the line through LAB_SPAN s of readings at its newest end: 2 u / sqrt(n) for n
        evenly spaced readings (the standard error of a fitted line's end point)."""
        if not self.follows_lab:
            return None
        if not self.reads_gauge:
            return 0.0
        return 2.0 * self.u_barometer / math.sqrt(LAB_SPAN / LAB_READ_EVERY)


def frame_slope_u(u_barometer: float, window: float, span: float = LAB_FRAME_SPAN,
                  every: float = LAB_READ_EVERY) -> float:
    """Pa/s, standard: the slope a settle window of ``window`` s sees in the lab line the detector
    follows (the newest end of a line through ``span`` s of readings ``every`` s apart, each with
    ``u_barometer`` of white noise) when the lab itself is still.

    Why: the line's newest end moves with every new reading, and a window's slope takes up that wander
    as if the closed gas moved (2 Pa readings once a second: 0.026 Pa/s over a 10 s window, as much as
    a 1 Pa transducer's own slope noise). Exact for white reading noise: the end value after each
    reading is a fixed weighting of the readings, and the window's slope a fixed weighting of those
    values, so the slope's variance is u^2 times the sum of the squared combined weights."""
    return u_barometer * _frame_slope_gain(max(round(span / every), 2), max(round(window / every), 2), every)


@functools.lru_cache(maxsize=256)
def _frame_slope_gain(n: int, m: int, every: float) -> float:
    """frame_slope_u for unit reading noise, by the counts of readings in the line (n) and the window (m):
    cached on those counts, as the windows a detector asks about differ only by rounding."""
    age = -every * np.arange(n)  # the line's readings, newest first
    centred = age - age.mean()
    end = 1.0 / n - centred * age.mean() / float(centred @ centred)  # weights of the end value at age 0
    tk = every * np.arange(m)
    c = (tk - tk.mean()) / float((tk - tk.mean()) @ (tk - tk.mean()))  # a window's slope, oldest first
    g = np.convolve(c, end)
    return math.sqrt(float(g @ g))


def settled_u_parts(det: SettleDetector) -> tuple[float, float]:
    """Standard uncertainties of a settled pressure: (the window regression's own, what is left of the
    relaxation).  Kept apart: the first is noise and averages over cycles, the second has the same
    sign every cycle.  An exponential still drifting at dP/dt has |dP/dt|*tau to go (methods: drift
    criterion); taken as a rectangular bound (divide by sqrt 3), tau from a sound fit of the window,
    else three windows (the longest time constant a window can resolve).  The window stated, not the
    longer one the fixed rule may use on a noisy gauge: that lengthening buys slope resolution, not
    slower physics, and three of the longer window raised U by up to 24 % on the accuracy bench's
    noisier instruments with coverage unchanged (99.4 % of 170 runs either way)."""
    u_reg = det.u_estimate if math.isfinite(det.u_estimate) else 0.0
    if det.criteria.max_remainder is not None:  # the remainder rule measured what was left: its bound
        left = det.remainder_bound
        return u_reg, (left if math.isfinite(left) else 0.0) / math.sqrt(3.0)
    fit = det.fit
    tau = fit.tau if fit is not None and fit.sound else 3.0 * det.criteria.window
    drift = det.drift if math.isfinite(det.drift) else 0.0
    return u_reg, abs(drift) * tau / math.sqrt(3.0)


def settle_model(det: SettleDetector) -> str:
    """What a decided settle was taken on, in words for the record: the drift rule, or under the remainder
    rule the slope bound, one relaxation or two (fitted over the settle), and whether the value is the
    model's asymptote.  Why: a scientist re-reading a run sees which values rest on a model's
    extrapolation and which on a measured end."""
    if det.criteria.max_remainder is None:
        how = "drift rule"
    else:
        how = ("slope bound", "one relaxation", "two relaxations")[det.relaxations]
    return f"{how}, extrapolated" if det.method == "extrapolated" else how


def settled_u(det: SettleDetector) -> float:
    """Both parts of settled_u_parts combined: the whole standard uncertainty of one settled value."""
    return math.hypot(*settled_u_parts(det))


def _mean_of_readings(temps: list[float]) -> tuple[float, int]:
    """Mean of a settle's last temperatures and the number of distinct readings in it.

    Why distinct: the thermometer is read more slowly than the pressure, so consecutive rows repeat
    one reading; its noise averages over the readings, not the rows (repeats of a quantised value
    merge too, which only makes the count, and so the stated u, more cautious)."""
    if not temps:
        return math.nan, 0
    return sum(temps) / len(temps), len(set(temps))


@dataclass(frozen=True)
class Drift:
    """The straight-line part of a settle: P(t) = a + slope t + A exp(-t/tau), fitted by least squares
    (linear in a, slope, A for each tau of a grid; the tau with the least residual wins)."""

    slope: float  # Pa/s
    u_slope: float  # Pa/s, standard error from the residuals
    tau: float  # s
    bend: float  # Pa, the exponential's change over the fitted span
    u_bend: float  # Pa, its standard error


def linear_drift(t: list[float], p: list[float]) -> Drift | None:
    """Separate a settle's steady drift from its relaxation.

    Why: a closed chamber after a fill or an expansion only relaxes (an exponential towards the
    wall temperature); a steady slope on top of that is gas going somewhere (a leaking valve seat)
    or a sample still taking gas, which the drift criterion of the settle may pass when it is small.
    None when there are too few samples to fit four parameters with spare degrees of freedom.
    """
    n = len(t)
    if n < 8:
        return None
    ts = np.asarray(t, dtype=float) - t[0]
    ps = np.asarray(p, dtype=float)
    span = float(ts[-1])
    if not span > 0:
        return None
    # Variable projection over the grid of time constants: the constant and the slope are projected
    # out once, so each tau leaves a one-column fit (all 60 in a few array operations); the chosen
    # tau is then fitted in full.
    taus = np.geomspace(0.1, 3.0 * span, 60)
    q, _ = np.linalg.qr(np.column_stack([np.ones(n), ts]))
    r0 = ps - q @ (q.T @ ps)
    e = np.exp(-ts[None, :] / taus[:, None])
    e_perp = e - (e @ q) @ q.T
    ee = np.einsum("kn,kn->k", e_perp, e_perp)
    er = e_perp @ r0
    with np.errstate(divide="ignore", invalid="ignore"):
        ssrs = float(r0 @ r0) - np.where(ee > 0.0, er * er / ee, 0.0)
    k = int(np.argmin(ssrs))  # the first of equal minima, as a scan keeping strict improvements would
    tau = float(taus[k])
    x = np.column_stack([np.ones(n), ts, e[k]])
    coef = np.linalg.lstsq(x, ps, rcond=None)[0]
    r = ps - x @ coef
    ssr = float(r @ r)
    cov = ssr / (n - 4) * np.linalg.pinv(x.T @ x)
    change = 1.0 - math.exp(-span / tau)  # the exponential column runs from 1 to exp(-span/tau)
    return Drift(float(coef[1]), math.sqrt(max(float(cov[1, 1]), 0.0)), tau, float(coef[2]) * change,
                 math.sqrt(max(float(cov[2, 2]), 0.0)) * change)


#: Share of the settled gauge pressure a steady slope must move it by over a settle before it counts
#: (see drift_unexplained): 1e-4, about 0.03 % of a typical sample volume.
MISFIT_REL = 1e-4
#: ... and, in units of one reading's u, the least it must move it by (a noisy gauge's own wander).
MISFIT_READINGS = 3.0
#: Standard errors a steady slope must stand out by.
DRIFT_SIGNIFICANCE = 4.0
#: A slow relaxation's remainder counts when beyond this many of its standard errors ...
SLOW_SIGNIFICANCE = 3.0
#: ... and holds a decision back while beyond this many of the settled pressure's stated u.
SLOW_LEFT_U = 2.0
#: ... but only a relaxation the fit resolves: tau at most this share of the span fitted.  A slower
#: one cannot be told from the lab's own wander (a room's temperature cycle moves a closed chamber by
#: tens of Pa over minutes; the noisy demo bench's was fitted as tau 300-500 s over a 400 s span).
SLOW_RESOLVED = 0.5
#: A settle may not end sooner than this share of the median time the same phase took to settle in the
#: run's earlier cycles (see CycleMeasurer._too_soon).  Decision times of one phase vary by about a
#: third from cycle to cycle under noise (a 30 s thermal bench's P2: 420-470 s); a half leaves that room.
SOONER_SHARE = 0.5
#: The run's first cycle is left out where its volume lies more than this many of its random u from the
#: later cycles' mean (CycleMeasurer._first_z).  The costs are lopsided: a first cycle left out wrongly
#: costs one more cycle (about 5 % of runs under an exact budget), one kept wrongly puts a third of its
#: offset into the result.  On the accuracy bench's 30 s thermal instrument (seed 0, 30 runs), where
#: the first cycles after the purge sit about 2 u low: at 3, cycle SD / noise-only u 1.64 and random u /
#: cycle SD 0.78 (a discarded first cycle: 1.05 and 1.19); at 2, 1.23 and 1.03, at 70 instead of 85 min.
FIRST_Z = 2.0
#: The vented system's hidden imbalance (CycleMeasurer._imbalance_left) may hold its zero back for at
#: most this share of the baseline's max_time; what is left then goes into the zero's u instead.
IMBALANCE_HOLD_SHARE = 0.8
#: The whole-settle fit takes block means down to this many points: a relaxation slow enough to
#: matter is smooth over a block (a 300 s settle's blocks are 2 s), and the fit costs what it must.
SLOW_POINTS = 60


def drift_unexplained(t: list[float], p: list[float], u_p: float) -> Drift | None:
    """The settle's steady drift when neither noise nor relaxation explains it, else None.

    Fitted on the phase's second half: the first moments after a valve event carry the flow
    transient and several thermal time constants at once, which one exponential does not describe;
    by the second half the slowest relaxation dominates.  Flagged when the slope is beyond
    ``DRIFT_SIGNIFICANCE`` standard errors (noise) AND moved the pressure over the whole settle by more
    than ``MISFIT_REL`` of it and ``MISFIT_READINGS`` u_p.
    Why those floors: one exponential is only an approximation of the relaxation (gas, walls and
    sample exchange heat at several rates); on the shipped clean simulator, noise-free, with no
    leak, the fit leaves a slope that moves P1 by 4.3 Pa (3.3e-5 of it) over a 21 s settle
    (measured), while a 3e-11 m^3/s leak past the closed expansion valve moves it by 25-33 Pa at
    8-15 standard errors with 5 Pa of gauge noise (measured on tests/fault_matrix.py's bench).
    And only when the relaxation is resolved (its fitted tau at most a third of the fitted span)
    or already over (no significant bend left): a slower one still bending (a porous sample, a lab
    drifting) cannot be told apart from a straight line within the span.
    """
    if len(t) < 16:
        return None
    half = len(t) // 2
    d = linear_drift(t[half:], p[half:])
    if d is None:
        return None
    moved = abs(d.slope) * (t[-1] - t[0])
    level = abs(sum(p[half:]) / len(p[half:]))
    resolved = d.tau <= (t[-1] - t[half]) / 3.0 or abs(d.bend) <= 3.0 * d.u_bend
    big = moved > max(MISFIT_REL * level, MISFIT_READINGS * u_p)
    return d if resolved and abs(d.slope) > DRIFT_SIGNIFICANCE * d.u_slope and big else None


_SETTLES = frozenset({RunState.BASELINE.value, RunState.SETTLE_FILLED.value, RunState.SETTLE_EXPANDED.value})
# plain strings for the per-row comparisons: looking up an enum member costs several times a str compare
_BASELINE = RunState.BASELINE.value
_LEAK_HOLD = RunState.LEAK_HOLD.value
_VENT = RunState.VENT.value


class OnlineSlope:
    """The least-squares slope of (t, p) pairs, updated one pair at a time in constant memory.

    Why: a leak hold may last days (a 16-hour hold is 577,000 samples at 10 Hz); keeping every sample
    to fit it at the end grew the engine by about 6 MB an hour.  Welford's co-moment updates keep the
    sums centred, so the slope is as accurate as a batch fit of the same pairs."""

    __slots__ = ("ctp", "ctt", "mp", "mt", "n")

    def __init__(self) -> None:
        self.n = 0
        self.mt = self.mp = self.ctt = self.ctp = 0.0

    def add(self, t: float, p: float) -> None:
        self.n += 1
        dt = t - self.mt
        self.mt += dt / self.n
        self.mp += (p - self.mp) / self.n
        self.ctt += dt * (t - self.mt)
        self.ctp += dt * (p - self.mp)

    @property
    def slope(self) -> float:
        """dp/dt in units of p per unit of t; NaN with fewer than two distinct times."""
        return self.ctp / self.ctt if self.n >= 2 and self.ctt > 0.0 else math.nan


@dataclass(frozen=True)
class LineWeights:
    """A SlidingLine value as a weighted sum of its rows: ``weights[i]`` is row ``first + i``'s."""

    first: int
    weights: tuple[float, ...]

    def correlation(self, other: LineWeights) -> float:
        """Correlation of two values' errors from the rows' noise (white, alike in every row): the
        rows they share over each one's own spread. Rows that repeat one slow reading count alike in
        both, so this stays the readings' correlation while the weights change slowly over a reading."""
        a, b = self.weights, other.weights
        if not a or not b:
            return 0.0
        lo = max(self.first, other.first)
        hi = min(self.first + len(a), other.first + len(b))
        shared = sum(a[i - self.first] * b[i - other.first] for i in range(lo, hi))
        norm = math.sqrt(sum(w * w for w in a) * sum(w * w for w in b))
        return max(-1.0, min(1.0, shared / norm)) if norm > 0.0 else 0.0


class SlidingLine:
    """A slowly changing reading now (the lab pressure, the wall temperature), from the readings of
    the last ``span`` s: a least-squares line through them evaluated at the newest time, once they span
    LAB_LINE_FROM s (their mean before). Why a line: a smoothing average lags a steady change by half
    its span and a settle would see that lag come and go; a line follows a steady change (weather, an
    air handler) without lag and averages the readings' noise. The measurer keeps one running from
    settle to settle (the gaps between are the fill's few seconds), so a settle does not start on a
    line of one reading. Running sums: it runs on every sample."""

    __slots__ = ("a0", "buf", "evicted", "n", "sa", "seq", "span", "st", "sta", "stt", "t0")

    def __init__(self, span: float = LAB_SPAN) -> None:
        self.span = span
        self.buf: deque[tuple[float, float]] = deque()
        self.n = self.evicted = 0
        self.seq = 0  # rows ever added: the newest row's number (LineWeights keys rows by it)
        self.st = self.sa = self.stt = self.sta = 0.0
        self.t0 = self.a0 = math.nan  # times and pressures are taken from these, for well-conditioned sums

    def _put(self, x: float, a: float, sign: float) -> None:
        self.n += int(sign)
        self.st += sign * x
        self.sa += sign * a
        self.stt += sign * x * x
        self.sta += sign * x * a

    def add(self, t: float, a: float) -> None:
        if not math.isfinite(self.t0):
            self.t0, self.a0 = t, a
        x, y = t - self.t0, a - self.a0
        buf = self.buf
        buf.append((x, y))
        self.seq += 1
        # the sums inline, not through _put: this runs on every sample of every settle and vent
        n, st, sa, stt, sta = self.n + 1, self.st + x, self.sa + y, self.stt + x * x, self.sta + x * y
        edge = x - self.span
        while buf[0][0] < edge:
            ox, oy = buf.popleft()
            n, st, sa, stt, sta = n - 1, st - ox, sa - oy, stt - ox * ox, sta - ox * oy
            self.evicted += 1
        self.n, self.st, self.sa, self.stt, self.sta = n, st, sa, stt, sta
        if self.evicted >= 8 * len(buf):  # start the sums afresh now and then, from the oldest reading
            dx, dy = buf[0]  # kept: no rounding builds up and the times stay small
            self.t0 += dx
            self.a0 += dy
            self.buf = deque((ox - dx, oy - dy) for ox, oy in self.buf)
            self.n = self.evicted = 0
            self.st = self.sa = self.stt = self.sta = 0.0
            for ox, oy in self.buf:
                self._put(ox, oy, 1.0)

    def slope_z(self, u_reading: float) -> float:
        """|slope| over its standard error for readings of noise ``u_reading`` (rows repeating one
        reading count once); 0 before the readings span LAB_LINE_FROM s, inf for a noise-free sensor."""
        n = self.n
        if n < 3 or self.buf[-1][0] - self.buf[0][0] < LAB_LINE_FROM:
            return 0.0
        mt, ma = self.st / n, self.sa / n
        sxx = self.stt - n * mt * mt
        if not sxx > 0.0:
            return 0.0
        slope = (self.sta - n * mt * ma) / sxx
        if not u_reading > 0.0:
            return math.inf if slope != 0.0 else 0.0
        return abs(slope) / (u_reading / math.sqrt(sxx * self._distinct() / n))

    def _distinct(self) -> int:
        """Readings in the line, rows that repeat one reading (a sensor read more slowly than the
        pressure) counted once."""
        return 1 + sum(1 for (_, a), (_, b) in itertools.pairwise(self.buf) if a != b)

    def at(self, t: float) -> float:
        n = self.n
        mt, ma = self.st / n, self.sa / n
        if self.buf[-1][0] - self.buf[0][0] < LAB_LINE_FROM:
            return self.a0 + ma
        var = self.stt / n - mt * mt
        slope = (self.sta / n - mt * ma) / var if var > 0.0 else 0.0
        return self.a0 + ma + slope * (t - self.t0 - mt)

    def weights(self, t: float) -> LineWeights:
        """What each row in the line weighs in ``at(t)``: at(t) = sum of weight * reading. Two values of
        one line taken at different times share the readings their spans overlap on, so their errors
        are correlated (LineWeights.correlation)."""
        n = self.n
        if n == 0:
            return LineWeights(self.seq + 1, ())
        buf = self.buf
        first = self.seq - n + 1
        if buf[-1][0] - buf[0][0] < LAB_LINE_FROM:
            return LineWeights(first, (1.0 / n,) * n)
        mt = self.st / n
        sxx = self.stt - n * mt * mt
        if not sxx > 0.0:
            return LineWeights(first, (1.0 / n,) * n)
        k = (t - self.t0 - mt) / sxx
        return LineWeights(first, tuple(1.0 / n + k * (x - mt) for x, _ in buf))

    def equivalent_readings(self, t: float) -> float:
        """How many independent readings a plain mean would need to be as certain as ``at(t)``.

        The line's value at t carries one reading's noise times sqrt(1/n + (t - mean)^2 / sum of the
        squared deviations of the times); rows that repeat one reading (a thermometer read more slowly
        than the pressure) count once, as in a mean (``_mean_of_readings``)."""
        n = self.n
        if n == 0:
            return 0.0
        buf = self.buf
        distinct = self._distinct()
        if buf[-1][0] - buf[0][0] < LAB_LINE_FROM:
            return float(distinct)
        mt = self.st / n
        sxx = self.stt - n * mt * mt
        if not sxx > 0.0:
            return float(distinct)
        factor = 1.0 / n + (t - self.t0 - mt) ** 2 / sxx
        return distinct / (n * factor)


class CycleMeasurer:
    """Turns a run's (state, row) stream into cycles: zeros, P1, P2, leak rates and cycle results."""

    def __init__(self, plan: CyclePlan) -> None:
        self.plan = plan
        self.cycles: list[CycleData] = []  # every cycle begun (a fill after a zero)
        self.results: list[results.CycleResult] = []  # every complete cycle, in order
        self.notes: list[str] = []  # settles of the zero that never decided
        self.zero: Zero | None = None
        self.current: CycleData | None = None
        self._fills = 0  # fills begun: a fill whose zero was not taken starts no cycle, but is counted
        self.last: Settled | None = None  # the settle value taken most recently
        self._state: str | None = None
        self._last_t = math.nan
        self._det: SettleDetector | None = None
        self._open = False  # a settle phase still waiting for its decision
        self._window: list[tuple[float, float]] = []  # (ambient, temp K) of valid-pressure rows: the zero
        self._temps: list[float] = []  # valid temperatures of a P1 / P2 phase
        self._temp_t = math.nan  # s, when the phase's last valid temperature was read
        self._ambients: list[float] = []  # lab pressure of the valid rows of a P1 / P2 phase
        self._trace: tuple[list[float], list[float]] = ([], [])  # valid (t, cell pressure) of a P1 / P2 phase
        amb = plan.ambient
        self._follow = amb is not None and amb.follows_lab
        self._smooth = amb is not None and amb.reads_gauge
        self._lab = math.nan  # the lab pressure the current settle adds back (smoothed under a gauge)
        self._lab_ref = math.nan  # its first value in the settle: the detector sees gauge + lab - ref
        self._lab_line = SlidingLine()
        self._frame_line = SlidingLine(LAB_FRAME_SPAN)  # the lab as the detector's frame follows it
        self._frame = math.nan  # the frame line's value at the last sample of the current settle
        self._wall_line = SlidingLine(WALL_SPAN)  # the thermometer's readings (the wall's temperature)
        self._wall = math.nan  # K, the line's value at the last sample of the current settle
        self._wall_ref = math.nan  # K, its first value in the settle
        self._wall_moves = False  # whether this settle follows the wall yet (WALL_SLOPE_Z)
        self._wall_check = -math.inf  # s, when the wall line's slope is next tested
        self._amb0 = math.nan  # Pa, the first lab reading of the settle: gauge + this ~ the absolute pressure
        self._leak = OnlineSlope()
        self._slow_cache: tuple[list[float], int, ExpFit | None] | None = None  # (trace times, length, fit)
        self._took: dict[str, list[float]] = {}  # s each settle state took to decide, in this run's cycles
        self._taus: list[float] = []  # s, the time constants this cycle's P1 and P2 fits resolved
        self._vents: list[tuple[float, float]] = []  # (s, Pa): each vent since the last fill with a known start
        self._before = (math.nan, math.nan)  # the last finite (gauge, lab) reading: what a vent starts from
        # the wall line's weights behind each settled temperature (ta, t1, t2) of this cycle: the three
        # share readings where their lines overlap, so their errors are correlated (_temperature_correlations)
        self._settled_weights: LineWeights | None = None
        self._zero_tw: LineWeights | None = None
        self._tw: dict[str, LineWeights] = {}

    # ----- the feed ---------------------------------------------------------------------------
    def feed(self, state: str, row: Row) -> SettleStatus | None:
        """One row in the given state; in a settle state, the detector's status after it."""
        return self.take_sample(state, row.t, row.gauge, row.ambient, row.temp_k)

    def take_sample(self, state: str, t: float, gauge: float, ambient: float, temp_k: float) -> SettleStatus | None:
        """feed() with the row's fields as arguments: the live engine's per-sample path builds no Row."""
        if state != self._state:
            self._leave(self._state, state)
            self._enter(state)
            self._state = state
        self._last_t = t
        if math.isfinite(gauge) and math.isfinite(ambient):
            self._before = (gauge, ambient)
        if state in _SETTLES:  # a settle's row, inline: this runs on most samples of a run
            det = self._det
            assert det is not None
            if not self._open:
                return det.status
            finite = math.isfinite(gauge)
            if finite:
                if not math.isfinite(self._amb0) and math.isfinite(ambient):
                    self._amb0 = ambient
                if self._follow:
                    gauge = self._cell_pressure(t, gauge, ambient)
                gauge = self._at_wall_ref(t, gauge, temp_k)
            if finite:  # the trace of every settle: a time-out names the relaxation it waited for
                self._trace[0].append(t)
                self._trace[1].append(gauge)
            if state == _BASELINE:
                if finite:
                    self._window.append((ambient, temp_k))
            else:
                if math.isfinite(temp_k):
                    self._temps.append(temp_k)
                    self._temp_t = t
                if finite:
                    self._ambients.append(ambient)
            status = det.feed(t, gauge) if finite else SettleStatus.WAITING
            if status is not SettleStatus.WAITING and not (status is SettleStatus.TIMED_OUT and self._too_few(det)):
                self._take(timed_out=status is SettleStatus.TIMED_OUT)
            return status
        if state == _LEAK_HOLD and math.isfinite(gauge):
            self._leak.add(t, gauge)
        # every other state's rows feed the lab lines (the lab is what it is whatever the valves do):
        # the run's first zero then starts on the purge's readings, not on a line of a few. The wall
        # line only the vent's: a thermometer placed in the gas would show a fill's heating
        if self._follow and self._smooth and math.isfinite(ambient):
            self._lab_line.add(t, ambient)
            self._frame_line.add(t, ambient)
        if state == _VENT and math.isfinite(temp_k):
            self._wall_line.add(t, temp_k)
        return None

    def _at_wall_ref(self, t: float, gauge: float, temp_k: float) -> float:
        """The settle's pressure as it would be at the wall temperature the settle began at. Why: a shut
        gas follows its wall; a lab whose temperature swings 0.15 K over 50 minutes moves P1 by up to
        0.2 Pa/s, which the rules took for relaxation still under way (the volume's computation already
        takes each pressure with its own temperature). The wall is read by the thermometer, the gas's
        own cooling and warming is not: that relaxation is what the rules wait for. Off without one."""
        if math.isfinite(temp_k):
            self._wall_line.add(t, temp_k)
        if not self._wall_line.n or not math.isfinite(self._amb0):
            return gauge
        if not self._wall_moves and t >= self._wall_check:  # looked at once a second until it moves
            self._wall_check = t + 1.0
            self._wall_moves = self._wall_line.slope_z(self.plan.u_t) >= WALL_SLOPE_Z  # followed from here on
        if not self._wall_moves:  # a wall steady within the thermometer's noise: nothing to follow, and
            return gauge  # _wall_ref stays unset, so _from_wall_ref gives the estimate back as it is
        wall = self._wall_line.at(t)
        if not math.isfinite(self._wall_ref):
            self._wall_ref = wall
        self._wall = wall
        return (gauge + self._amb0) * (self._wall_ref / wall) - self._amb0

    def _from_wall_ref(self, estimate: float) -> float:
        """An estimate taken at the settle's reference wall temperature back at the wall's temperature now."""
        if not (math.isfinite(self._wall) and math.isfinite(self._wall_ref) and math.isfinite(self._amb0)):
            return estimate
        return (estimate + self._amb0) * (self._wall / self._wall_ref) - self._amb0

    def _cell_pressure(self, t: float, gauge: float, ambient: float) -> float:
        """The closed cell's pressure, less a constant: the gauge reading plus the lab pressure's change
        since the settle began. An absolute transducer's reading comes back exactly (its gauge is the
        reading less the same lab value); under a gauge transducer the lab readings are smoothed
        by a line through them (SlidingLine), so one reading's noise and the one-second updates do not
        enter. ``_as_gauge`` turns a value taken back into a gauge value, so the stored values keep
        their meaning."""
        if math.isfinite(ambient):
            if self._smooth:
                line = self._lab_line
                line.add(t, ambient)
                self._lab = line.at(t)
                frame = self._frame_line
                frame.add(t, ambient)
                self._frame = frame.at(t)
            else:
                self._lab = self._frame = ambient
            if not math.isfinite(self._lab_ref):
                self._lab_ref = self._frame
        return gauge + self._offset()

    def _offset(self) -> float:
        """What _cell_pressure adds to the gauge reading now (0 before any valid lab reading)."""
        return self._frame - self._lab_ref if math.isfinite(self._frame) else 0.0

    def _as_gauge(self, estimate: float, lab: float) -> float:
        """A settled estimate back as a gauge value against ``lab``, the lab pressure the computation
        adds to it (the mean of the last readings): so the absolute pressure it computes is the
        detector's own estimate of the closed cell's, with no barometer reading's noise added."""
        if not (self._follow and math.isfinite(self._lab_ref) and math.isfinite(lab)):
            return estimate
        return estimate + self._lab_ref - self._frame + self._lab - lab

    def give_up(self) -> bool:
        """The engine's time limit ran out with the detector still waiting: take its estimate so far,
        flagged. False when there is no estimate to take."""
        det = self._det
        if det is None or not math.isfinite(det.estimate) or det.shortfall is not None:
            return False
        if self._open:
            self._take(timed_out=True)
        return True

    @property
    def shortfall(self) -> str | None:
        """The current settle's 'not settled: too few samples' (SettleDetector.shortfall), else None."""
        return self._det.shortfall if self._det is not None else None

    def _too_few(self, det: SettleDetector) -> bool:
        """Whether a settle that ran out of time never had the samples its drift test needs: then nothing
        is taken (its value would carry no standard error: a zero u for a pressure nobody judged) and a
        note says why; a zero not taken leaves the next fill without a cycle."""
        short = det.shortfall
        if short is None:
            return False
        self._open = False
        if self._state == RunState.BASELINE:
            self.zero = None
            self.notes.append(f"baseline before fill {self._fills + 1}: {short}")
        else:
            which = "P1" if self._state == RunState.SETTLE_FILLED else "P2"
            where = f"of cycle {len(self.cycles)}" if self.current is not None else \
                f"of fill {self._fills} (no cycle: the zero before it was not taken)"
            self.notes.append(f"{which} {where}: {short}")
        return True

    @property
    def leak_rate(self) -> float:
        """Least-squares slope (Pa/s) of the valid gauge readings of the leak hold so far."""
        return self._leak.slope

    def slow_relaxation(self) -> tuple[float, float, float] | None:
        """(time constant s, pressure still to come Pa, settle time s it would need) of the relaxation
        the current settle is in, from an exponential fitted to its last two thirds (the first third
        holds the fast flow and thermal transients); None when no sound fit is found.  Why: a settle
        that runs out of time must say what it waited for - a time constant of minutes is a porous
        sample filling or sample heat, not a leak - and how long it would take.

        The time needed is when the fitted remainder falls below what the decision waits for (the
        veto's bound) and, under a fixed drift limit, when its slope falls below that limit."""
        fit = self._slow_fit()
        det = self._det
        if det is None or fit is None or not (fit.interior and math.isfinite(fit.tau) and fit.tau > 0):
            return None
        left = self._still_to_come(fit)
        elapsed = self._trace[0][-1] - det.t0
        waits = [0.0]
        bound = max(SLOW_LEFT_U * math.hypot(*settled_u_parts(det)), MISFIT_REL * abs(det.estimate))
        if bound > 0 and abs(left) > bound:
            waits.append(fit.tau * math.log(abs(left) / bound))
        limit = det.criteria.max_drift
        if limit is not None and abs(left) / fit.tau > limit:
            waits.append(fit.tau * math.log(abs(left) / (fit.tau * limit)))
        rest = det.criteria.max_remainder
        if rest is not None:  # the decision compares the remainder times its gain with the limit
            rest /= det.criteria.remainder_gain
        if rest is not None and abs(left) > rest:
            waits.append(fit.tau * math.log(abs(left) / rest))
        return fit.tau, left, elapsed + max(waits)

    def _slow_fit(self) -> ExpFit | None:
        """One exponential fitted to the last two thirds of the current settle (None below 30 samples,
        or when no fit is found)."""
        t, p = self._trace
        if len(t) < 30:
            return None
        if self._det is not None and self._det.window_start <= t[len(t) // 3]:
            return None  # all of it lies in the detector's window, whose own fit and bound speak for it
        if self._slow_cache is not None and self._slow_cache[0] is t and self._slow_cache[1] == len(t):
            return self._slow_cache[2]  # the veto just fitted these samples: the decision reuses it
        ts = np.asarray(t[len(t) // 3:], dtype=float)
        ps = np.asarray(p[len(p) // 3:], dtype=float)
        ts, ps, _ = block_means(ts, ps, SLOW_POINTS)
        try:
            fit: ExpFit | None = fit_exponential_detail(ts, ps, precise=False)
        except ValueError:
            fit = None
        self._slow_cache = (t, len(t), fit)
        return fit

    def _slower_tau(self, det: SettleDetector) -> float | None:
        """Under the drift rules: the time constant of the whole settle (the fit of its last two thirds)
        where it is sound and longer than the three windows the budget otherwise takes for the window's
        slope, capped at the span fitted (nothing slower can be told from it); else None.

        Why: after an expansion into a slow volume the pressure is the sum of two relaxations of
        30-40 s and opposite sign; the window's slope passes 0.5 Pa/s with 24 Pa still to come, where
        three 10 s windows bound 15 Pa, and the calibrations made so came out 2.5-4 u off in Vr on the
        accuracy bench's 30 s thermal instrument."""
        if det.criteria.max_remainder is not None or not math.isfinite(det.drift):
            return None
        fit = self._slow_fit()
        t = self._trace[0]
        if fit is None or not (fit.sound and len(t) > 1):
            return None
        span = t[-1] - fit.t_ref
        tau = min(fit.tau, span)
        return tau if tau > 3.0 * det.criteria.window else None

    def _still_to_come(self, fit: ExpFit) -> float:
        """Pa the fitted relaxation has yet to move the pressure after the last sample (signed)."""
        return fit.amplitude * math.exp(-(self._trace[0][-1] - fit.t_ref) / fit.tau)

    def _slow_remainder(self) -> float | None:
        """|Pa| still to come of a relaxation the whole settle resolves (a sound fit, its remainder
        beyond 3 standard errors), else None."""
        fit = self._slow_fit()
        if fit is None or not fit.sound or fit.tau > SLOW_RESOLVED * (self._trace[0][-1] - fit.t_ref):
            return None
        left = abs(self._still_to_come(fit))
        return left if left > SLOW_SIGNIFICANCE * fit.u_p_inf else None

    def _veto(self, state: str) -> bool:
        """The detector's last word before a decision: too soon for this phase, or (P1, P2) a slow
        relaxation still pending, or (the zero) the imbalance the transducer cannot see still too large."""
        if state == _BASELINE:
            return self._too_soon(state) or self._imbalance_pending()
        return self._too_soon(state) or self._slow_pending()

    def _imbalance_left(self) -> float:
        """Pa: a bound on what the expansion volume's gas may still hold of the vent's cooling that the
        transducer cannot see (NaN where no vent or no resolved time constant is known).

        Why: the vent cools both chambers' gas; closed again they warm together at one pressure, but each
        at its own rate, and the faster one is then compressed above the wall while the slower one is
        still cold.  Of that imbalance the pressure shows only the part their volumes do not cancel: in
        a two-chamber model (each gas relaxing to its wall, both compressed alike) the expansion volume's
        own remainder is 1/(a_x + a_c v_c/v_x) times the pressure's (a: volume shares, v: the slow mode),
        about 5 for a 12 cm^3 cell relaxing in 30 s and an 8 cm^3 volume in 39 s, and without bound as
        the two time constants meet.  The simulated 30 s thermal bench closed its expansion volume 7-11
        Pa short, 0.02 K cold, when the zero's own remainder was 2 Pa; its calibrations came out 0.03 %
        low in Vr (mean z -1.4).  So no multiple of the visible remainder bounds it - only time: the
        imbalance began no larger than the vent's adiabatic cooling, Pa (1 - (Pa/P)^((g-1)/g)) from the
        pressure P the vent started at, and decays at least as fast as the slowest relaxation the
        cycle's settles resolved."""
        det = self._det
        if not self._vents or det is None:
            return math.nan
        taus = [x for x in (*self._taus, det.slowest_tau) if math.isfinite(x) and x > 0]
        if not taus:
            return math.nan
        tau = max(taus)
        return max(d * math.exp(-max(self._last_t - t, 0.0) / tau) for t, d in self._vents)

    def _imbalance_pending(self) -> bool:
        """The baseline's veto: the hidden imbalance is still above max_remainder (the remainder rule's
        limit), up to IMBALANCE_HOLD_SHARE of max_time; the zero's u takes what is left then."""
        det = self._det
        assert det is not None
        limit = det.criteria.max_remainder
        if limit is None or det.elapsed >= IMBALANCE_HOLD_SHARE * det.criteria.max_time:
            return False
        left = self._imbalance_left()
        return math.isfinite(left) and left > limit

    def _too_soon(self, state: str) -> bool:
        """Whether the settle would end before SOONER_SHARE of the median time this phase took in the
        run's earlier cycles.

        Why: one chamber, gas and fill relax alike from cycle to cycle, and a decision far sooner than
        the same phase's before is one the data fooled: where the cell's gas warms while a slower
        expansion volume's cools, the pressure rises, stays level at its top for many seconds and then
        falls for minutes, and under 8 Pa of noise one exponential fits the top as a finished rise (4 of
        12 synthetic settles taken there, 130 Pa above their end).  The first cycle has no history: it is
        judged once two later cycles have settled (``_doubt_first``).  Held back, the settle goes on and
        decides on what follows the top."""
        took = self._took.get(state)
        det = self._det
        if not took or det is None:
            return False
        return det.elapsed < SOONER_SHARE * float(np.median(took))

    def _slow_pending(self) -> bool:
        """The detector's veto on a P1 / P2 decision: a relaxation slower than its window, resolved over
        the whole settle, still has more to come than SLOW_LEFT_U times the settled pressure's stated u
        and than ``MISFIT_REL`` of the pressure (about 0.03 % of a typical sample volume: below that a
        noise-free gauge would wait for what the volume cannot show; the budget takes the remainder as a
        rectangular bound either way).

        Why: the drift rule sees only its window, and a relaxation of minutes (gas filling a porous
        specimen's open pores, sample heat) looks like a straight line there; its remainder |dP/dt| tau
        then exceeds the bound the budget takes (tau at most three windows) several times over (a
        specimen with 0.5 cm^3 of pores filling with 120 s gave +0.38 %, none of 30 runs within U,
        once max_time let it settle).  Held back, such a settle either waits the relaxation out or
        times out with the message that names it."""
        det = self._det
        assert det is not None
        left = self._slow_remainder()
        if left is None:
            return False
        return left > max(SLOW_LEFT_U * math.hypot(*settled_u_parts(det)), MISFIT_REL * abs(det.estimate))

    @property
    def estimate(self) -> float:
        """The current settle's estimate (NaN outside a settle)."""
        return self._det.estimate if self._det is not None else math.nan

    @property
    def drift(self) -> float:
        return self._det.drift if self._det is not None else math.nan

    # ----- phases -----------------------------------------------------------------------------
    def _enter(self, state: str) -> None:
        if state in _SETTLES:
            crit = {RunState.BASELINE: self.plan.baseline, RunState.SETTLE_FILLED: self.plan.filled,
                    RunState.SETTLE_EXPANDED: self.plan.expanded}[RunState(state)]
            self._det = SettleDetector(crit, self._last_t)
            self._det.veto = functools.partial(self._veto, state)
            amb = self.plan.ambient
            if self._follow and self._smooth and amb is not None and amb.u_barometer > 0:
                self._det.slope_noise = functools.partial(frame_slope_u, amb.u_barometer)
            self._open = True
            self._window, self._temps, self._ambients = [], [], []
            self._temp_t = math.nan
            self._trace = ([], [])
            self._lab = self._lab_ref = self._frame = math.nan  # the lines run on: the lab is the lab throughout
            self._wall = self._wall_ref = self._amb0 = math.nan
            self._wall_moves, self._wall_check = False, -math.inf
        elif state == RunState.FILL:
            self._fills += 1
            self.current = None
            self._taus, self._vents = [], []
            self._tw = {"ta": self._zero_tw} if self._zero_tw is not None else {}
            if self.zero is not None:
                z = self.zero
                self.current = CycleData(index=len(self.cycles) + 1, volume_name=self.plan.volume_name,
                                         baseline_pa=z.value, u_baseline_pa=z.u, u_baseline_relax_pa=z.u_relax,
                                         ambient_pa=z.ambient, ta_k=z.temp_k, n_ta=z.n_temps)
                self.cycles.append(self.current)
        elif state == RunState.LEAK_HOLD:
            self._leak = OnlineSlope()
        elif state in (RunState.VENT, RunState.PURGE_VENT):
            cooling = self._vent_cooling()
            if math.isfinite(cooling):
                self._vents.append((self._last_t, cooling))

    def _leave(self, state: str | None, nxt: str) -> None:
        """A phase ended: an undecided settle followed by its next step was accepted on time-out."""
        if state not in _SETTLES:
            return
        goes_on = {RunState.BASELINE: (RunState.FILL,),
                   RunState.SETTLE_FILLED: (RunState.EXPAND, RunState.LEAK_HOLD),
                   RunState.SETTLE_EXPANDED: (RunState.VENT,)}[RunState(state)]
        if self._open and nxt in goes_on and self._det is not None and math.isfinite(self._det.estimate) \
                and not self._too_few(self._det):
            self._take(timed_out=True)
        elif self._open and state == RunState.BASELINE:
            self.zero = None  # no zero: the next fill (if any) starts no cycle
        if state == RunState.SETTLE_EXPANDED and nxt == RunState.VENT:
            self._complete()
        self._open = False
        self._det = None

    def _take(self, *, timed_out: bool) -> None:
        """Record the decided (or given-up) settle as the zero, P1 or P2."""
        det = self._det
        assert det is not None
        self._open = False
        if not timed_out and self._state is not None:
            self._took.setdefault(self._state, []).append(det.elapsed)
        if self._state == RunState.BASELINE:
            if timed_out:
                self.notes.append(f"baseline before fill {self._fills + 1}: not settled under these rules")
            recent = self._window[-_LAST:]
            temp, n_temps = self._settled_temperature([w[1] for w in recent if math.isfinite(w[1])])
            self._zero_tw = self._settled_weights
            u_reg, u_relax = settled_u_parts(det)
            hidden = self._imbalance_left()
            if math.isfinite(hidden):  # what the expansion volume may still hold unseen, as a rectangular bound
                u_relax = math.hypot(u_relax, hidden / math.sqrt(3.0))
            lab = sum(w[0] for w in recent) / len(recent)
            estimate = self._as_gauge(self._from_wall_ref(det.estimate), lab)
            self.zero = Zero(estimate, u_reg, lab, temp, u_relax, n_temps, self._last_t)
            self.last = Settled(estimate, u_reg, temp, det.elapsed, det.drift, u_relax, n_temps,
                                window=det.window, model=settle_model(det))
            return
        cyc = self.current
        if cyc is None:
            return
        # a thermometer that stopped answering during the settle gives no temperature for its end: the
        # readings from before the gap are not the gas's now (found by a sweep: a thermometer gone for 300 s
        # over a P1 left it the readings of the settle's first 1.6 s, and the cycle was kept)
        fresh = self._last_t - self._temp_t <= TEMPERATURE_RECENT
        temp, n_temps = self._settled_temperature(self._temps[-_LAST:] if fresh else [])
        key = "t1" if self._state == RunState.SETTLE_FILLED else "t2"
        if self._settled_weights is None:
            self._tw.pop(key, None)
        else:
            self._tw[key] = self._settled_weights
        u_reg, u_relax = settled_u_parts(det)
        slow = self._slow_remainder()
        if slow is not None:  # what a resolved slow relaxation still has to move, as a rectangular bound
            u_relax = max(u_relax, slow / math.sqrt(3.0))
        longer = self._slower_tau(det)
        if longer is not None:  # the window's slope goes on for the settle's own time constant
            u_relax = max(u_relax, abs(det.drift) * longer / math.sqrt(3.0))
        drift = drift_unexplained(*self._trace, self.plan.u_p)
        if drift is not None:
            # a steady slope the relaxation does not explain (a leak, gas going into the sample): the
            # pressure it moved over the settle is the error it may have left, as a rectangular bound;
            # on a settle given up at its time limit too (a leak the hold would not pass ends there)
            span = self._trace[0][-1] - self._trace[0][0]
            u_relax = math.hypot(u_relax, abs(drift.slope) * span / math.sqrt(3.0))
        ambients = [a for a in self._ambients[-_LAST:] if math.isfinite(a)]
        ambient = sum(ambients) / len(ambients) if ambients else math.nan
        value = self._as_gauge(self._from_wall_ref(det.estimate), ambient)
        val = Settled(value - cyc.baseline_pa, u_reg, temp, det.elapsed, det.drift, u_relax, n_temps, ambient,
                      self._last_t, det.window, settle_model(det))
        since = self._last_t - self.zero.t_at if self.zero is not None else math.nan
        self.last = val
        which = "p1" if self._state == RunState.SETTLE_FILLED else "p2"
        self._taus.append(det.slowest_tau)
        if which == "p1":
            cyc.p1_gauge_pa, cyc.u_p1_settle_pa, cyc.u_p1_relax_pa, cyc.t1_k = val.p, val.u, val.u_relax, val.t
            cyc.settle1_s, cyc.drift1_pa_s, cyc.n_t1 = val.time, val.drift, n_temps
            cyc.ambient1_pa, cyc.since_zero1_s = ambient, since
        else:
            cyc.p2_gauge_pa, cyc.u_p2_settle_pa, cyc.u_p2_relax_pa, cyc.t2_k = val.p, val.u, val.u_relax, val.t
            cyc.settle2_s, cyc.drift2_pa_s, cyc.n_t2 = val.time, val.drift, n_temps
            cyc.ambient2_pa, cyc.since_zero2_s = ambient, since
        if timed_out:
            cyc.flags.append(f"unsettled_{which}")  # the time limit ran out with the pressure still moving
        if drift is not None:
            cyc.flags.append(f"drift_{which}")  # a steady slope no relaxation explains: a leak

    def _vent_cooling(self) -> float:
        """Pa: the lab pressure times the adiabatic cooling of a vent from the last reading before it, the
        largest imbalance the vent can leave between the chambers' gas (0 from the lab's pressure, NaN
        where none is known)."""
        gauge, pa = self._before
        p = pa + gauge
        if not (math.isfinite(p) and pa > 0):
            return math.nan
        if p <= pa:
            return 0.0
        try:
            g = float(get_gas(self.plan.gas).gamma)
            exponent = (g - 1.0) / g
        except UnknownGas:  # no gamma known: (g - 1)/g < 1 for every gas, so 1 bounds the cooling from above
            exponent = 1.0
        return float(pa * (1.0 - (pa / p) ** exponent))

    def _settled_temperature(self, readings: list[float]) -> tuple[float, int]:
        """(K, equivalent number of readings): the gas temperature of the value just settled. The
        thermometer reads the wall (see _at_wall_ref) and a settled gas is at its wall's temperature,
        so this is the wall line's value now - a line through the last WALL_SPAN of readings - not the
        mean of the settle's last few rows. Why: with 0.01 K of reading noise a mean of 20 readings
        moved each cycle's volume several times as much as the pressures' own noise did; the line
        averages hundreds and still follows a wall that drifts. The readings' mean where no line runs,
        and no temperature where the settle had no valid reading (a line is never stretched over a
        thermometer that stopped answering)."""
        line = self._wall_line
        self._settled_weights = None
        if not readings or line.n == 0 or not math.isfinite(self._last_t):
            return _mean_of_readings(readings)
        self._settled_weights = line.weights(self._last_t)
        return line.at(self._last_t), max(int(line.equivalent_readings(self._last_t)), 1)

    def _temperature_correlations(self) -> tuple[float, float, float]:
        """Correlations of the errors of T1 and T2, T1 and Ta, T2 and Ta: each is a value of one line
        through the last WALL_SPAN of thermometer readings, and a zero, its P1 and its P2 are often
        less than that apart, so their lines share most readings. Independent where one was a plain
        mean (no line ran)."""
        w = self._tw

        def r(a: str, b: str) -> float:
            return w[a].correlation(w[b]) if a in w and b in w else 0.0

        return r("t1", "t2"), r("t1", "ta"), r("t2", "ta")

    def _complete(self) -> None:
        cyc = self.current
        if cyc is None or not (math.isfinite(cyc.p1_gauge_pa) and math.isfinite(cyc.p2_gauge_pa)):
            return
        if self.results and self.results[-1].index == cyc.index:
            return
        cyc.r_t1_t2, cyc.r_t1_ta, cyc.r_t2_ta = self._temperature_correlations()
        p = self.plan
        amb = p.ambient
        self.results.append(results.cycle_result(
            cyc, p.chambers, gas=p.gas, u_p_sys=p.u_p_sys, u_t=p.u_t, discard=p.discard,
            barometer=amb is not None and amb.barometer, u_barometer=amb.u_barometer if amb else 0.0,
            ambient_drift_rate=amb.drift_rate if amb else 0.0, u_lab=amb.u_followed if amb else None,
            thermometer=p.thermometer))
        self._doubt_first()

    def _doubt_first(self) -> None:
        """Leave the run's first cycle out once two later ones show that one of its settles (P1 or P2)
        ended before SOONER_SHARE of the time the same phase took in them, or that its volume lies
        more than FIRST_Z of its random u from theirs.

        Why: ``_too_soon`` holds back a decision far sooner than the run's earlier ones, but the first
        cycle has none before it, so a top that looked finished (see ``_too_soon``) could only be caught
        afterwards; and the first cycle alone follows the purge (``_first_z``).  Where a sequence keeps
        its first cycle (no discard) these are those checks, late."""
        res = self.results
        if len(res) < 3 or not res[0].kept or res[0].index != 1:
            return
        first = res[0]
        for name in ("settle1_s", "settle2_s"):
            own = getattr(first, name)
            later = [t for t in (getattr(c, name) for c in res[1:]) if math.isfinite(t)]
            if math.isfinite(own) and len(later) >= 2 and own < SOONER_SHARE * float(np.median(later)):
                res[0] = replace(first, kept=False, flags=[*first.flags, results.SETTLED_TOO_SOON])
                return
        if abs(self._first_z()) > FIRST_Z:
            res[0] = replace(first, kept=False, flags=[*first.flags, results.STILL_SETTLING_IN])

    def _first_z(self) -> float:
        """The first cycle's volume against the mean of the later kept ones, in units of their random u
        (the parts that change from cycle to cycle; what all cycles share cancels in the difference).

        Why: the first cycle follows the purge, whose vents leave the gas and the specimen another
        thermal history than a cycle's; on a 30 s thermal bench it came out within the 0.1 % agreement
        but about 2 of its own u below the rest, and a third of that reached the mean."""
        first = self.results[0]
        later = [(c.volume_m3, c.budget.random_variance) for c in self.results[1:] if c.kept and c.budget is not None]
        if first.budget is None or len(later) < 2:
            return 0.0
        mean = float(np.mean([v for v, _ in later]))
        var = first.budget.random_variance + float(np.mean([r for _, r in later])) / len(later)
        return (first.volume_m3 - mean) / math.sqrt(var) if var > 0 else 0.0
