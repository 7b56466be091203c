"""Deciding when the gas in a chamber has settled after a fill or an expansion.

After a fill the gas is warm and the pressure falls; after an expansion it is cold and the
pressure rises.  Both relax roughly as P(t) = Pinf + A exp(-t/tau).  The detector keeps a
sliding window of samples, fits a straight line to it with running sums (O(1) per sample), and
declares the gas settled when the slope is small enough:

* a fixed limit ``max_drift`` (Pa/s), or
* the adaptive rule of methods.md: the offset still to come from an exponential is
  |dP/dt| * tau, so accept when |dP/dt| < k * u_p / tau, tau taken from an exponential fit
  over the window (refitted at most once per ``fit_interval`` of sample time, and again at
  decision time).

The recorded pressure is the regression line evaluated at the window's end (better than one
sample: it averages the noise), or, when ``extrapolate`` is on and the exponential fit is
sound, the fitted Pinf.  Pure code: no I/O, no clock; the caller passes sample times.
"""

from __future__ import annotations

import bisect
import enum
import math
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from pycnoctl.controller.maths.twoexp import TwoExpFit, fit_two_exponentials

__all__ = [
    "MIN_WINDOW_SAMPLES",
    "ExpFit",
    "SettleCriteria",
    "SettleDetector",
    "SettleStatus",
    "block_means",
    "fit_exponential",
    "fit_exponential_detail",
    "min_window",
    "resolving_span",
    "three_point_extrapolation",
    "window_samples",
]


#: The fixed rule's window is lengthened until noise alone leaves its slope max_drift / RESOLVE of
#: standard error (see SettleDetector._resolving_span).
RESOLVE = 2.0
#: A drift rule's hold is at least this share of the time the settle took to get under its limit
#: (see SettleDetector._hold).
HOLD_SHARE = 0.2
HOLD_CAP = 1.0  # ... but not over this many windows: under noise a longer unbroken hold seldom completes
#: Under the remainder rule, where a fit of the settle's last two thirds gives the remainder, this
#: many refits (fit_interval apart) in a row: a turning point shows in that fit as misfit (the rule then
#: waits) rather than as a slope that is level for a moment, so half a window only added 5 s to settles
#: the fit had decided (the clean demo's P2 and zeros)
FITTED_HOLD = 2.0


#: The fewest samples the regression window must hold.  A straight line through n points leaves n - 2
#: degrees of freedom for its residuals: only from three points on has its slope a standard error
#: (``SettleDetector._regression``, ``_slope_se``), so the drift test has nothing to judge below that.
MIN_WINDOW_SAMPLES = 3


def window_samples(window: float, dt: float) -> int:
    """How many samples a window of ``window`` s holds at one sample every ``dt`` s, both ends counted:
    the detector keeps the samples no older than the window (with the same 1e-9 tolerance)."""
    if not (dt > 0 and math.isfinite(dt)):
        raise ValueError(f"the sample period must be a positive number of seconds, got {dt!r}")
    return math.floor(window / dt * (1.0 + 1e-9)) + 1


def min_window(dt: float) -> float:
    """The shortest window (s) that holds MIN_WINDOW_SAMPLES samples at one every ``dt`` s."""
    return (MIN_WINDOW_SAMPLES - 1) * dt


class SettleStatus(enum.Enum):
    WAITING = "waiting"
    SETTLED = "settled"
    TIMED_OUT = "timed_out"


@dataclass(frozen=True)
class SettleCriteria:
    """When to call a chamber settled.

    window: s of samples in the regression; max_drift: Pa/s, or None for the adaptive rule
    |dP/dt| < drift_k * u_p / tau (u_p: standard uncertainty of one pressure reading, Pa), or, with
    ``max_remainder`` (Pa), the remainder rule: the relaxation still to come after the last sample
    under max_remainder (or drift_k times the readings' noise where larger);
    min_time / max_time: s since the detector's t0; extrapolate: record the fitted Pinf when
    the exponential fit is sound.
    """

    window: float
    max_drift: float | None
    min_time: float
    max_time: float
    extrapolate: bool
    drift_k: float = 1.0
    u_p: float | None = None
    fit_interval: float = 1.0  # s of sample time between exponential refits (adaptive rule)
    hold: float | None = None  # s the drift rule must hold without a break; None -> half the window
    # Pa: the remainder rule (replaces max_drift): accept when the relaxation still to come after the
    # last sample is under max_remainder, or k times the readings' noise where larger - see
    # SettleDetector._remainder
    max_remainder: float | None = None
    # Pa/s: under the remainder rule, a steady slope up to this much is the lab's, not relaxation still
    # to come (a gauge transducer with no barometer reads against a lab whose pressure drifts; the
    # instrument config bounds that drift and the budget counts it) - see SettleDetector._relaxing
    steady_slope: float = 0.0
    # under the remainder rule: Pa of error per Pa of a fitted relaxation the settled system has still
    # to go (1 for P1, P2). The zero is read on the cell and the expansion volume together, but only the
    # expansion volume's gas, closed off at the fill, carries what is left into the result; where its
    # relaxation is the slower one it holds nearly all of it: up to (Vc + Vr) / Vr times the pair's
    # remainder. Only the relaxation the fit resolves: a bound at the noise floor cannot be waited down
    remainder_gain: float = 1.0

    def __post_init__(self) -> None:
        if not (self.window > 0 and math.isfinite(self.window)):
            raise ValueError(f"window must be a positive number of seconds, got {self.window!r}")
        if self.max_drift is not None and not self.max_drift > 0:
            raise ValueError(f"max_drift must be > 0 Pa/s or None, got {self.max_drift!r}")
        if self.max_drift is None and not (self.u_p is not None and self.u_p > 0):
            raise ValueError("the adaptive drift rule (max_drift=None) needs u_p > 0 Pa")
        if self.max_remainder is not None:
            if not (self.max_remainder > 0 and math.isfinite(self.max_remainder)):
                raise ValueError(f"max_remainder must be a finite pressure > 0 Pa, got {self.max_remainder!r}")
            if self.max_drift is not None:
                raise ValueError("the remainder rule replaces max_drift: give max_drift=None with it")
        if not self.drift_k > 0:
            raise ValueError(f"drift_k must be > 0, got {self.drift_k!r}")
        if not (self.remainder_gain >= 1.0 and math.isfinite(self.remainder_gain)):
            raise ValueError(f"remainder_gain must be a finite factor >= 1, got {self.remainder_gain!r}")
        if not (self.steady_slope >= 0 and math.isfinite(self.steady_slope)):
            raise ValueError(f"steady_slope must be a finite rate >= 0 Pa/s, got {self.steady_slope!r}")
        if self.min_time < 0 or not self.max_time > 0 or self.max_time < self.min_time:
            raise ValueError(f"need 0 <= min_time <= max_time, got {self.min_time!r}, {self.max_time!r}")
        if not self.fit_interval > 0:
            raise ValueError("fit_interval must be > 0 s")
        if self.hold is not None and not (self.hold >= 0 and math.isfinite(self.hold)):
            raise ValueError(f"hold must be a finite number of seconds >= 0, got {self.hold!r}")

    @property
    def hold_time(self) -> float:
        """How long the slope must stay under the limit: a window sliding over a turning point (a
        pressure that rises, peaks and falls again) sees a near-zero slope for a moment only."""
        return self.window / 2 if self.hold is None else self.hold


# ----------------------------------------------------------------------------- exponential fits


def three_point_extrapolation(p0: float, p1: float, p2: float, spacing: float) -> tuple[float, float]:
    """Pinf and tau of P = Pinf + A exp(-t/tau) through three equally spaced samples.

    Pinf = (p0 p2 - p1^2)/(p0 + p2 - 2 p1), tau = D / ln((p0 - p1)/(p1 - p2)) (methods.md).
    Raises ValueError when the three points are not on a decaying exponential.
    """
    if not spacing > 0:
        raise ValueError("spacing must be > 0")
    d1 = p0 - p1
    d2 = p1 - p2
    denom = d1 - d2  # = p0 + p2 - 2 p1
    if d1 == 0 or d2 == 0 or denom == 0:
        raise ValueError("points are flat or on a straight line: no finite asymptote")
    ratio = d1 / d2
    if ratio <= 1.0:  # opposite signs (not monotonic) or growing steps
        raise ValueError("points do not decay toward an asymptote")
    p_inf = (p0 * p2 - p1 * p1) / denom
    tau = spacing / math.log(ratio)
    return float(p_inf), float(tau)


@dataclass(frozen=True)
class ExpFit:
    """Least-squares fit of p = p_inf + amplitude * exp(-(t - t_ref)/tau), t_ref = first sample time."""

    p_inf: float
    amplitude: float
    tau: float
    residual_sd: float
    u_p_inf: float  # standard error of p_inf (nan when there are no spare degrees of freedom)
    u_amplitude: float
    t_ref: float
    n: int
    interior: bool  # the best tau lies strictly inside the search range (not a boundary)
    sound: bool  # fit can be trusted for extrapolation (see _is_sound)
    u_last: float = math.nan  # standard error of the fitted curve at the last sample (tau's part included)


def _ssr_for_tau(s: np.ndarray, y: np.ndarray, tau: float) -> tuple[float, float, float]:
    """Residual sum of squares and (a, b) of y = a + b exp(-s/tau), solved linearly."""
    n = s.size
    e = np.exp(-s / tau)
    e_mean = float(np.add.reduce(e)) / n
    y_mean = float(np.add.reduce(y)) / n
    ec = e - e_mean
    yc = y - y_mean
    see = float(ec @ ec)
    if see <= 1e-300:
        return float(yc @ yc), y_mean, 0.0
    sey = float(ec @ yc)
    b = sey / see
    a = y_mean - b * e_mean
    ssr = max(float(yc @ yc) - b * sey, 0.0)
    return ssr, a, b


def _ssr_grid(s: np.ndarray, y: np.ndarray, taus: np.ndarray) -> np.ndarray:
    """_ssr_for_tau's residual sum of squares for many taus at once (one array operation)."""
    n = s.size  # sums over n rather than .mean(): the same numbers without numpy's per-call overhead
    e = np.exp(-s[None, :] / taus[:, None])
    ec = e - np.add.reduce(e, axis=1, keepdims=True) / n
    yc = y - np.add.reduce(y) / n
    see = np.einsum("ij,ij->i", ec, ec)
    sey = ec @ yc
    syy = float(yc @ yc)
    with np.errstate(divide="ignore", invalid="ignore"):
        ssr = np.where(see > 1e-300, syy - sey * sey / see, syy)
    return np.maximum(ssr, 0.0)


#: The remainder rule fits at most this many block means of the settle (see SettleDetector._fit_settle).
SETTLE_FIT_POINTS = 60
#: ... and takes its fit as the settle's model only while the fit's residual SD is at most MISFIT_NOISE
#: times the block means' noise plus MISFIT_FLOOR of max_remainder (a misfit well under the tolerance
#: cannot move the prediction by it; the floor keeps a noise-free trace from failing on rounding).
MISFIT_NOISE = 1.5
MISFIT_FLOOR = 0.1
_FAR = 2.0  # a slope this many thresholds away is refitted this many times less often (see _check_drift)
_COARSE = 90  # log-spaced points of the whole tau search range
_FINE = 65  # points of the finer grid over the best bracket of the coarse one
# around a tau hint: 25 points from hint/1.5 to hint*1.5 (3.4 % apart; the parabola's vertex then
# gives tau to a few per mille, all a threshold needs); a refit 1-2 s later rarely moves tau that far
_WARM_LOGS = np.linspace(-math.log(1.5), math.log(1.5), 25)


def fit_exponential_detail(t: np.ndarray | list[float], p: np.ndarray | list[float], *,
                           precise: bool = True, tau_hint: float | None = None) -> ExpFit:
    """Fit p = p_inf + A exp(-(t - t[0])/tau) by least squares.

    For each trial tau the model is linear in (p_inf, A), so only tau is searched: a log-spaced
    grid, golden-section refinement of the best bracket, then Gauss-Newton polishing of all three
    parameters, whose Jacobian also gives the standard errors.  No scipy needed.
    ``precise=False`` takes tau from a finer grid over the best bracket (about 0.1 % in tau, from
    the vertex of a parabola through its best three points) and skips the golden section and the
    polish: enough when only the time constant's size is wanted (the settle uncertainty), at a
    fraction of the cost.  ``tau_hint`` (a recent fit's tau) searches a fine grid within a factor
    1.5 of it first, and the whole range only when the best point lies on its edge: a refit of a
    window that moved by a second needs no search over six decades.
    """
    t_arr = np.asarray(t, dtype=float)
    p_arr = np.asarray(p, dtype=float)
    if t_arr.shape != p_arr.shape or t_arr.ndim != 1:
        raise ValueError("t and p must be 1-D arrays of equal length")
    n = t_arr.size
    if n < 3:
        raise ValueError("an exponential fit needs at least three samples")
    if not (np.isfinite(t_arr).all() and np.isfinite(p_arr).all()):
        raise ValueError("non-finite sample in fit")
    t_ref = float(t_arr[0])
    s = t_arr - t_ref
    span = float(s[-1] - s[0])
    steps = np.diff(s)
    if span <= 0 or (steps <= 0).any():
        raise ValueError("sample times must increase")
    # condition the pressures: centre and scale
    p_mid = float(np.add.reduce(p_arr)) / n
    p_scale = float(p_arr.max() - p_arr.min()) or 1.0
    y = (p_arr - p_mid) / p_scale

    tau_lo = max(float(np.min(steps)) * 0.25, span * 1e-4)
    tau_hi = span * 100.0
    j = -1
    if tau_hint is not None:
        # a fine grid around the hint straight away; the whole range when the best point is an edge
        fine = math.log(tau_hint) + _WARM_LOGS
        if fine[0] > math.log(tau_lo) and fine[-1] < math.log(tau_hi):
            fssr = _ssr_grid(s, y, np.exp(fine))
            j = int(np.argmin(fssr))
            n_fine = fine.size
            interior = 0 < j < n_fine - 1
            if not interior:
                j = -1
    if j < 0:
        grid = np.geomspace(tau_lo, tau_hi, _COARSE)
        ssr = _ssr_grid(s, y, grid)
        k = int(np.argmin(ssr))
        interior = 0 < k < grid.size - 1
        lo = math.log(grid[max(k - 1, 0)])
        hi = math.log(grid[min(k + 1, grid.size - 1)])
        # a finer grid over the bracket narrows it 32 times in one array operation (a golden-section
        # search needs seven sequential evaluations for that)
        n_fine = _FINE
        fine = np.linspace(lo, hi, n_fine)
        fssr = _ssr_grid(s, y, np.exp(fine))
        j = int(np.argmin(fssr))
    lo, hi = float(fine[max(j - 1, 0)]), float(fine[min(j + 1, n_fine - 1)])
    if precise:
        golden = (math.sqrt(5.0) - 1.0) / 2.0
        c = hi - golden * (hi - lo)
        d = lo + golden * (hi - lo)
        fc = _ssr_for_tau(s, y, math.exp(c))[0]
        fd = _ssr_for_tau(s, y, math.exp(d))[0]
        for _ in range(80):
            if hi - lo < 1e-12:
                break
            if fc < fd:
                hi, d, fd = d, c, fc
                c = hi - golden * (hi - lo)
                fc = _ssr_for_tau(s, y, math.exp(c))[0]
            else:
                lo, c, fc = c, d, fd
                d = lo + golden * (hi - lo)
                fd = _ssr_for_tau(s, y, math.exp(d))[0]
        log_tau = (lo + hi) / 2.0
    else:  # the vertex of the parabola through the fine grid's three best points is close enough
        log_tau = float(fine[j])
        if 0 < j < n_fine - 1:
            f0, f1, f2 = float(fssr[j - 1]), float(fssr[j]), float(fssr[j + 1])
            curv = f0 - 2.0 * f1 + f2
            if curv > 0.0:
                log_tau += 0.5 * (f0 - f2) / curv * float(fine[1] - fine[0])
    tau = math.exp(log_tau)
    _, a, b = _ssr_for_tau(s, y, tau)
    jac = np.empty((n, 3))
    if precise:
        # the polish compares residual sums computed directly: _ssr_for_tau's shortcut cancels to
        # round-off (or to its zero floor) near an exact fit and would turn every improving step away
        resid = y - (a + b * np.exp(-s / tau))
        f_best = float(resid @ resid)

    # Gauss-Newton polish on (a, b, tau) and covariance from the Jacobian
    for _ in range(8 if precise else 0):
        e = np.exp(-s / tau)
        jac[:, 0] = 1.0
        jac[:, 1] = e
        jac[:, 2] = b * s / (tau * tau) * e
        r = y - (a + b * e)
        try:
            step, *_ = np.linalg.lstsq(jac, r, rcond=None)
        except np.linalg.LinAlgError:
            break
        new_tau = tau + step[2]
        if not (new_tau > 0 and math.isfinite(new_tau)):
            break
        trial = y - (a + step[0] + (b + step[1]) * np.exp(-s / new_tau))
        f_new = float(trial @ trial)
        if f_new > f_best * (1 + 1e-12) + 1e-300:
            break
        a, b, tau, f_best = a + step[0], b + step[1], new_tau, f_new
        if abs(step[2]) < 1e-12 * tau:
            break

    e = np.exp(-s / tau)
    jac[:, 0] = 1.0
    jac[:, 1] = e
    jac[:, 2] = b * s / (tau * tau) * e
    dof = n - 3
    resid = y - (a + b * e)
    ssr_final = float(resid @ resid)
    resid_sd = math.sqrt(ssr_final / dof) if dof > 0 else 0.0
    u_a = u_b = u_last = math.nan
    if dof > 0:
        try:
            cov = np.linalg.inv(jac.T @ jac) * (ssr_final / dof)
            u_a = math.sqrt(max(cov[0, 0], 0.0))
            u_b = math.sqrt(max(cov[1, 1], 0.0))
            g = jac[-1]  # the fitted curve's gradient in (a, b, tau) at the last sample
            u_last = math.sqrt(max(float(g @ cov @ g), 0.0))
        except np.linalg.LinAlgError:
            pass
    interior = interior and tau_lo < tau < tau_hi
    fit = ExpFit(
        p_inf=float(p_mid + p_scale * a),
        amplitude=float(p_scale * b),
        tau=float(tau),
        residual_sd=p_scale * resid_sd,
        u_p_inf=p_scale * u_a,
        u_last=p_scale * u_last,
        u_amplitude=p_scale * u_b,
        t_ref=t_ref,
        n=n,
        interior=bool(interior),
        sound=False,
    )
    return _with_soundness(fit, span)


def _with_soundness(fit: ExpFit, span: float) -> ExpFit:
    """A fit is sound for extrapolation when the exponential is resolved, not just a bent line.

    Required: tau strictly inside the search range and no longer than 3 window spans (beyond
    that Pinf is a guess far outside the data), at least two spare degrees of freedom, the
    amplitude at least 3 standard errors from zero, and a finite standard error of Pinf.
    """
    sound = (
        fit.interior
        and fit.tau <= 3.0 * span
        and fit.n >= 5
        and math.isfinite(fit.u_p_inf)
        and math.isfinite(fit.u_amplitude)
        and abs(fit.amplitude) > 3.0 * fit.u_amplitude
    )
    return ExpFit(**{**fit.__dict__, "sound": bool(sound)})


def fit_exponential(
    t: np.ndarray | list[float], p: np.ndarray | list[float]
) -> tuple[float, float, float, float]:
    """(p_inf, amplitude, tau, residual_sd) of p = p_inf + amplitude exp(-(t - t[0])/tau).

    The amplitude is referred to the first sample time t[0] (so large clock values do not overflow).
    """
    f = fit_exponential_detail(t, p)
    return f.p_inf, f.amplitude, f.tau, f.residual_sd


def _line_under(t: np.ndarray, p: np.ndarray) -> float:
    """|Pa/s| of a straight line under one relaxation, p = c + s t + A exp(-t/tau), when s is beyond two
    standard errors (else 0).  A relaxation slower than the span fitted shows as such a line.

    Variable projection: c and s are projected out once, each tau of a log grid then leaves a one-column
    fit (all in a few array operations); a finer grid over the best bracket and the vertex of a parabola
    through its three best points give tau to about 0.1 % - a coarser tau leaves a misfit that the line
    takes up on a noise-free trace."""
    n = t.size
    ts = t - t[0]
    span = float(ts[-1])
    if not span > 0:
        return 0.0
    q, _ = np.linalg.qr(np.column_stack([np.ones(n), ts]))
    r0 = p - q @ (q.T @ p)

    def ssr(taus: np.ndarray) -> np.ndarray:
        e = np.exp(-ts[None, :] / taus[:, None])
        e_perp = e - (e @ q) @ q.T
        ee = np.einsum("kn,kn->k", e_perp, e_perp)
        er = e_perp @ r0
        with np.errstate(divide="ignore", invalid="ignore"):
            out: np.ndarray = float(r0 @ r0) - np.where(ee > 0.0, er * er / ee, 0.0)
        return out

    coarse = np.geomspace(max(float(np.min(np.diff(ts))) * 0.25, span * 1e-4), 3.0 * span, 60)
    k = int(np.argmin(ssr(coarse)))
    fine = np.linspace(math.log(coarse[max(k - 1, 0)]), math.log(coarse[min(k + 1, coarse.size - 1)]), 65)
    fs = ssr(np.exp(fine))
    j = int(np.argmin(fs))
    log_tau = float(fine[j])
    if 0 < j < fine.size - 1:
        curv = float(fs[j - 1] - 2.0 * fs[j] + fs[j + 1])
        if curv > 0.0:
            log_tau += 0.5 * float(fs[j - 1] - fs[j + 1]) / curv * float(fine[1] - fine[0])
    x = np.column_stack([np.ones(n), ts, np.exp(-ts / math.exp(log_tau))])
    try:
        coef, *_ = np.linalg.lstsq(x, p, rcond=None)
        r = p - x @ coef
        cov = float(r @ r) / max(n - 4, 1) * np.linalg.pinv(x.T @ x)
    except np.linalg.LinAlgError:
        return 0.0
    slope, u_slope = abs(float(coef[1])), math.sqrt(max(float(cov[1, 1]), 0.0))
    return slope if slope > 2.0 * u_slope else 0.0


def block_means(t: np.ndarray, p: np.ndarray, points: int) -> tuple[np.ndarray, np.ndarray, int]:
    """(times, pressures, samples per block): means of blocks of equal size, at most ``points`` of
    them, the oldest few samples left out so that the last block ends on the last sample.  A fit of a
    whole settle then costs what a fit of ``points`` samples costs."""
    b = -(-t.size // points)
    if b > 1:
        cut = t.size % b
        t = t[cut:].reshape(-1, b).mean(axis=1)
        p = p[cut:].reshape(-1, b).mean(axis=1)
    return t, p, b


def resolving_span(n: int, dt: float, span: float, limit: float, u_p: float, cap: float,
                   extra: Callable[[float], float] | None = None) -> float:
    """The window (s) a drift limit needs: ``span`` (n samples dt apart) where white noise of u_p leaves
    its regression slope a standard error of at most limit / RESOLVE, else the shortest window that
    does, at most ``cap`` (see SettleDetector._resolving_span; the expansion-volume advisor predicts a
    settled pressure's u over the same window).  ``extra``: Pa/s of slope noise over a window of the
    given length that the samples carry besides their own white noise (the lab line a settle follows),
    added in quadrature."""
    if not dt > 0:
        return span
    target = limit / RESOLVE

    def noise_se(m: int) -> float:
        if m < 2:  # one sample has no slope at all (a window shorter than the sample period)
            return math.inf
        own = u_p / (dt * math.sqrt(m * (m * m - 1) / 12.0))
        return own if extra is None else math.hypot(own, extra((m - 1) * dt))

    if noise_se(n) <= target:  # the stated window resolves the limit: it stays as it is
        return span
    # every part falls as the window grows: the shortest that resolves, by bisection, up to the cap
    top = max(n + 1, math.floor(cap / dt) + 1)
    if noise_se(top) > target:
        return float(cap)
    lo = n
    while top - lo > 1:
        mid = (lo + top) // 2
        lo, top = (lo, mid) if noise_se(mid) <= target else (mid, top)
    return float(min((top - 1) * dt, cap))


# ----------------------------------------------------------------------------- the detector


class SettleDetector:
    """Feeds on valid gauge-pressure samples and says when the gas has settled.

    The decision is final: once SETTLED or TIMED_OUT, further samples are ignored and the
    estimate stays the one taken at decision time.  Regression sums run over the sliding window
    (added on arrival, subtracted on eviction, recomputed from scratch once per window length
    of evictions so rounding cannot build up): O(1) amortised per sample.
    """

    def __init__(self, criteria: SettleCriteria, t0: float) -> None:
        self.criteria = criteria
        self.t0 = float(t0)
        self._bt: deque[float] = deque()  # window sample times and pressures, kept apart so a fit
        self._bp: deque[float] = deque()  # reads them into arrays without a tuple per sample
        self._evicted = 0
        self._status = SettleStatus.WAITING
        self._t_last = math.nan
        self._decided_at: float | None = None
        self._fit: ExpFit | None = None
        self._fit_t: float = -math.inf  # sample time of the last exponential fit
        self._fit_precise = False  # whether that fit was polished (golden section and Gauss-Newton)
        self._sound: ExpFit | None = None  # the latest sound fit, while the data still agree with it
        self._threshold: float | None = criteria.max_drift
        self._quiet_since: float | None = None  # first sample of the current unbroken run under the limit
        self._frozen: tuple[float, float, float, float, str] | None = None  # est, u, drift, u_drift, how
        self._left = math.nan  # remainder rule: Pa still to come after the decision's last sample
        self._fitted_now = False  # remainder rule: the last remainder came from a fit of the relaxation
        self._unfitted = math.nan  # ... of which the part no fitted relaxation accounts for (see _remainder)
        # the regression window in use: the stated one, or longer where the noise needs it (below)
        self._span = criteria.window
        self._span_set = (criteria.max_drift is None and criteria.max_remainder is None) or criteria.u_p is None
        # the remainder rule: the settle's samples so far, for the fit of its relaxation (see _remainder)
        self._all_t: list[float] = []
        self._all_p: list[float] = []
        self._sfit: ExpFit | None = None
        self._sfit_t = -math.inf
        self._sfit_span = 0.0
        self._sfit_adequate = True
        self._sfit_line = 0.0  # |Pa/s| of a significant straight line under the fitted relaxation
        self._sfit_hidden = 0.0  # Pa of misfit the readings' noise can hide from the fit (see _remainder)
        self._sfit_noise = 0.0  # Pa: the readings' noise, measured from their third differences
        self._sfit2: TwoExpFit | None = None  # two relaxations, where one misfits and two fit (see _fit_settle)
        # the owner's last word before a decision (True: not yet): what the window alone cannot see,
        # e.g. a relaxation slower than it, judged from the whole settle (CycleMeasurer._slow_pending)
        self.veto: Callable[[], bool] | None = None
        # Pa/s of slope noise over a window of the given length (s) that the samples carry besides the
        # transducer's own: the owner's following of the lab through noisy readings (CycleMeasurer)
        self.slope_noise: Callable[[float], float] | None = None
        self._reset_sums(self.t0, math.nan)

    # -- running sums --------------------------------------------------------------------------
    def _reset_sums(self, t_ref: float, p_ref: float) -> None:
        self._tr, self._pr = t_ref, p_ref
        self._n = 0
        self._sx = self._sy = self._sxx = self._sxy = self._syy = 0.0

    def _add(self, t: float, p: float, sign: float) -> None:
        x = t - self._tr
        y = p - self._pr
        self._n += int(sign)
        self._sx += sign * x
        self._sy += sign * y
        self._sxx += sign * x * x
        self._sxy += sign * x * y
        self._syy += sign * y * y

    def _resync(self) -> None:
        t_first, p_first = self._bt[0], self._bp[0]
        self._reset_sums(t_first, p_first)
        for t, p in zip(self._bt, self._bp, strict=True):
            self._add(t, p, 1.0)
        self._evicted = 0

    def _slope(self) -> float:
        """Just the regression slope: what the every-sample drift check needs."""
        n = self._n
        if n < 2:
            return math.nan
        sxx = self._sxx - self._sx * self._sx / n
        return (self._sxy - self._sx * self._sy / n) / sxx if sxx > 0 else math.nan

    def _regression(self) -> tuple[float, float, float, float]:
        """(value at window end, its SE, slope, slope SE) from the running sums."""
        n = self._n
        if n < 2:
            return math.nan, math.nan, math.nan, math.nan
        xbar = self._sx / n
        ybar = self._sy / n
        sxx = self._sxx - self._sx * xbar
        sxy = self._sxy - self._sx * ybar
        syy = self._syy - self._sy * ybar
        if sxx <= 0:
            return ybar + self._pr, math.nan, math.nan, math.nan
        slope = sxy / sxx
        x_end = self._t_last - self._tr
        value = self._pr + ybar + slope * (x_end - xbar)
        if n < 3:
            return value, math.nan, slope, math.nan
        s2 = max(syy - slope * sxy, 0.0) / (n - 2)
        u_value = math.sqrt(s2 * (1.0 / n + (x_end - xbar) ** 2 / sxx))
        u_slope = math.sqrt(s2 / sxx)
        return value, u_value, slope, u_slope

    # -- exponential fit over the window ------------------------------------------------------
    def _refit(self, precise: bool = True, warm: bool = False) -> ExpFit | None:
        """Fit the window; ``warm``: search around the last fit's tau first (the periodic refits
        that only set the threshold; the fit a decision records always searches the whole range)."""
        n = len(self._bt)
        if n < 5:
            return None
        hint = self._fit.tau if warm and self._fit is not None and self._fit.interior else None
        try:
            fit = fit_exponential_detail(np.fromiter(self._bt, float, n), np.fromiter(self._bp, float, n),
                                         precise=precise, tau_hint=hint)
        except ValueError:
            fit = None
        self._fit = fit
        self._fit_t = self._t_last
        self._fit_precise = precise
        if fit is not None and fit.sound and self._agrees(fit):
            self._sound = fit  # a fit of the noise (tau far below a sample spacing) does not replace a real one
        return fit

    def _adaptive_threshold(self) -> float:
        """k u / tau; tau from the latest sound fit, else the window length; u the stated u_p, or the
        noise the sound fit measured when that is larger.

        Using the window when no exponential is resolved means: over one window the pressure
        may move no more than k u_p.  (A trace with tau much longer than the window looks like
        a straight line and its remaining offset cannot be known from the window alone.)
        """
        c = self.criteria
        assert c.u_p is not None
        tau = self._supported_tau()
        u = c.u_p
        f = self._sound
        if f is not None and tau == f.tau and math.isfinite(f.residual_sd):
            # the noise as measured: the residuals of a sound fit of the window are the gauge's own
            # scatter, so a config that understates it does not leave the rule waiting on noise
            u = max(u, f.residual_sd)
        return c.drift_k * u / tau

    def _supported_tau(self) -> float:
        """The latest sound fit's tau while the window's slope agrees with it, else the window.

        Why the check: a sound fit stays remembered when later fits fail (a relaxation decayed into
        the noise can no longer be fitted), but one fitted across an expansion's turning point
        (tau 0.47 s seen) would then set a lax threshold while the gas still drifts (33 Pa/s seen).
        The fit predicts the window's mean slope, |A| (exp(-(ta - t_ref)/tau) - exp(-(tb - t_ref)/tau))
        / (tb - ta); a window slope beyond that by more than 3 of its standard errors says the data no
        longer support that tau, and it is dropped for good."""
        f = self._sound
        if f is None:
            return self.criteria.window
        if not self._agrees(f):
            self._sound = None
            return self.criteria.window
        return f.tau

    def _agrees(self, f: ExpFit) -> bool:
        """Whether the window's regression slope is within 3 standard errors of the fit's mean slope
        over the same window (what a regression slope measures, not the end value)."""
        slope = self._slope()
        ta, tb = self._bt[0], self._t_last
        if not (math.isfinite(slope) and tb > ta):
            return True
        predicted = f.amplitude * (math.exp(-max(ta - f.t_ref, 0.0) / f.tau)
                                   - math.exp(-max(tb - f.t_ref, 0.0) / f.tau)) / (tb - ta)
        return abs(slope + predicted) <= 3.0 * self._slope_se(slope) + 1e-12

    def _slope_se(self, slope: float) -> float:
        """Standard error of the window's regression slope, from its residuals (0 below 3 samples)."""
        n = self._n
        if n < 3:
            return 0.0
        sxx = self._sxx - self._sx * self._sx / n
        if not sxx > 0:
            return 0.0
        sxy = self._sxy - self._sx * self._sy / n
        syy = self._syy - self._sy * self._sy / n
        return math.sqrt(max(syy - slope * sxy, 0.0) / (n - 2) / sxx)

    # -- feeding -------------------------------------------------------------------------------
    def feed(self, t: float, p: float) -> SettleStatus:
        """Add one valid gauge-pressure sample (Pa) taken at time t (s); returns the status."""
        if self._status is not SettleStatus.WAITING:
            return self._status
        t = float(t)
        p = float(p)
        if not (math.isfinite(t) and math.isfinite(p)):
            raise ValueError("settle detector takes only valid, finite samples")
        if self._bt and t <= self._t_last:
            raise ValueError(f"sample time {t} does not advance past {self._t_last}")
        c = self.criteria
        if not self._bt:
            self._reset_sums(t, p)
        self._bt.append(t)
        self._bp.append(p)
        self._t_last = t
        if c.max_remainder is not None:
            self._all_t.append(t)
            self._all_p.append(p)
        self._add(t, p, 1.0)
        edge = t - self._span * (1.0 + 1e-9)
        while self._bt[0] < edge:
            ot, op = self._bt.popleft(), self._bp.popleft()
            self._add(ot, op, -1.0)
            self._evicted += 1
        if self._evicted >= max(len(self._bt), 16):
            self._resync()

        elapsed = t - self.t0
        window_full = elapsed >= self._span * (1.0 - 1e-9) and self._n >= MIN_WINDOW_SAMPLES
        if window_full and not self._span_set:
            self._span_set = True
            span = self._resolving_span()
            if span > self._span:  # keep the samples from here on until the longer window is full
                self._span = span
                window_full = False
        quiet = window_full and self._check_drift()
        if not quiet:
            self._quiet_since = None
        elif self._quiet_since is None:
            self._quiet_since = t
        held = quiet and self._quiet_since is not None and t - self._quiet_since >= self._hold() * (1.0 - 1e-9)
        if held and elapsed >= c.min_time:
            if self._confirmed() and not (self.veto is not None and self.veto()):
                self._decide(SettleStatus.SETTLED)
                return self._status
            self._quiet_since = None  # the hold is broken: a fit of the window, or the veto, says so
        if elapsed >= c.max_time:
            self._decide(SettleStatus.TIMED_OUT)
        return self._status

    def _hold(self) -> float:
        """How long the slope must stay under the limit: the rule's hold, or HOLD_SHARE of the time
        the settle took to get there (at most HOLD_CAP windows), whichever is longer. Why: where two
        relaxations of opposite sign and like time constants meet (the cell's gas warming while the
        expansion volume's cools) the pressure rises, stays level for many seconds and falls again,
        and with noise a hold of half a window passed on the level top (a 7.19 cm3 specimen measured
        6.99 on a 30 s thermal bench). A top comes after a rise that took a time like the
        relaxations' own; a slope that needed minutes to fall under the limit is confirmed over a
        time in proportion. A gas quiet within 2.5 windows keeps the stated hold (window / 2) - unless
        the remainder rule's fit of the whole settle says what is left (then FITTED_HOLD fits)."""
        c = self.criteria
        floor = FITTED_HOLD * c.fit_interval if self._fitted_now else c.hold_time
        quiet = self._quiet_since
        if quiet is None:
            return floor
        return max(floor, min(HOLD_SHARE * (quiet - self.t0), HOLD_CAP * self._span))

    def _resolving_span(self) -> float:
        """The shortest window over which white noise of u_p leaves the slope a standard error of at
        most max_drift / RESOLVE, at the sample spacing seen so far (capped at half of max_time).

        Why: the fixed rule compares the window's slope with max_drift, and the slope of a window of N
        samples dt apart carries u_p / (dt sqrt(N (N^2 - 1) / 12)) of noise alone.  Where that is
        comparable with max_drift (20 Pa of noise, 0.1 s samples and a 10 s window give 0.69 Pa/s
        against 0.5 Pa/s) a still gas passes the test only now and then, the hold never completes
        and the settle times out; a moving one may pass by chance.  With the standard error at
        max_drift / 2 a still gas passes 95 % of looks.  Decided once, when the stated window is
        first full, so the live run and its replay lengthen it alike."""
        c = self.criteria
        assert c.u_p is not None
        # the remainder rule's fallback compares |slope| x 3 windows with its limit: the same as a drift
        # limit of limit / (3 windows)
        limit = c.max_drift if c.max_drift is not None else self._remainder_limit() / (3.0 * c.window)
        n = len(self._bt)
        dt = (self._t_last - self._bt[0]) / (n - 1)
        return resolving_span(n, dt, self._span, limit, c.u_p, max(c.window, c.max_time / 2.0), self.slope_noise)

    def _check_drift(self) -> bool:
        c = self.criteria
        slope = self._slope()
        if not math.isfinite(slope):
            return False
        if c.max_drift is not None:
            self._threshold = c.max_drift
            return abs(slope) < c.max_drift
        if c.max_remainder is not None:
            if self._t_last - self._sfit_t >= c.fit_interval:
                self._fit_settle(precise=False)
            return self._remainder_small()
        # the threshold needs only the time constant's size: the fine grid's value (about 0.1 % in tau)
        # costs a fraction of the polished fit, which is made once, at the decision, if extrapolating.
        # A slope several times over the last threshold cannot pass unless tau shrank as many times,
        # so far from the limit the fit is refreshed at half the pace (the fit's agreement with
        # the window is still checked on every sample, and a decision always refits)
        far = self._threshold is not None and abs(slope) >= _FAR * self._threshold
        if self._t_last - self._fit_t >= c.fit_interval * (_FAR if far else 1.0):
            self._refit(precise=False, warm=True)
        self._threshold = self._adaptive_threshold()
        return abs(slope) < self._threshold

    def _confirmed(self) -> bool:
        """The adaptive rule's last word before a decision: the threshold from a fit of the current
        window, not one up to ``fit_interval`` old (between refits the hold is checked against the
        latest fit; refitting on every quiet sample cost a fit per sample for a whole hold)."""
        c = self.criteria
        if c.max_remainder is not None:
            if self._sfit_t != self._t_last:
                self._fit_settle(precise=False)
            return self._remainder_small()
        if c.max_drift is not None or self._fit_t == self._t_last:
            return True
        self._refit(precise=False)
        self._threshold = self._adaptive_threshold()
        return abs(self._slope()) < self._threshold

    # -- the remainder rule ---------------------------------------------------------------------
    def _fit_settle(self, precise: bool) -> ExpFit | None:
        """One exponential fitted to the last two thirds of the settle so far (block means, at most
        ``SETTLE_FIT_POINTS``): the remainder rule's model of the relaxation since the valve event.
        The first third goes: it holds the flow transient and the faster thermal parts, which one
        exponential does not describe."""
        n = len(self._all_t)
        self._sfit_t = self._t_last
        self._sfit = None
        self._sfit2 = None
        self._sfit_adequate = True
        if n < 15:
            return None
        ts = np.asarray(self._all_t[n // 3:], dtype=float)
        ps = np.asarray(self._all_p[n // 3:], dtype=float)
        # the readings' own noise, from their third differences (white noise of sigma gives them
        # sigma sqrt(20); a relaxation's slope and curvature hardly reach them), robustly (median
        # absolute deviation): what the fit's residuals may be, so that a misfit can be seen
        d3 = np.diff(ps, 3)
        noise = 1.4826 * float(np.median(np.abs(d3 - np.median(d3)))) / math.sqrt(20.0) if d3.size else 0.0
        ts, ps, b = block_means(ts, ps, SETTLE_FIT_POINTS)
        try:
            fit: ExpFit | None = fit_exponential_detail(ts, ps, precise=precise)
        except ValueError:
            fit = None
        self._sfit = fit
        self._sfit_span = float(ts[-1] - ts[0]) if ts.size > 1 else 0.0
        self._sfit_line = 0.0
        if fit is not None:
            assert self.criteria.max_remainder is not None
            allowed = MISFIT_NOISE * noise / math.sqrt(b) + MISFIT_FLOOR * self.criteria.max_remainder
            self._sfit_adequate = bool(fit.residual_sd <= allowed)
            self._sfit_hidden, self._sfit_noise = allowed, noise
            if not self._sfit_adequate:  # model selection: a second relaxation where one misfits
                two = fit_two_exponentials(ts, ps)
                if two is not None and two.sound and two.residual_sd <= allowed:
                    self._sfit2 = two
            # the line under it counts only where the fit speaks for the settle: fitted only then
            if self._sfit_adequate and self._fit_supports(fit) and ts.size >= 8:
                line = _line_under(ts, ps)
                if line * self._sfit_span > MISFIT_FLOOR * self.criteria.max_remainder:
                    self._sfit_line = line  # smaller, it is the time-constant grid's own step
        return fit

    def _remainder(self) -> tuple[float, bool]:
        """(|Pa| the relaxation has still to go after the last sample, whether a fit said so).

        From the latest fit of the settle (``_fit_settle``, at most ``fit_interval`` old) when it is
        sound and its time constant at most the span it was fitted on: its exponential at the last
        sample, with two standard errors of its amplitude - the pressure's own prediction, free of the
        lag of a window slope (a 10 s window's slope over a 2 s relaxation is its mean over the window,
        several times the slope at its end); plus what a fit of one exponential cannot see (below).
        Otherwise a slope bound: |slope| times three windows, the slowest relaxation a window can tell
        from a line, or a sound fit's longer time constant.  Neither while the fit leaves
        residuals the readings' noise does not explain: the settle then holds more than one relaxation,
        or a turning point (after an expansion into a slow volume the pressure rises for 40 s and falls
        for minutes; at its top a window's slope is zero and a fit of its bend looks sound), and what is
        left cannot be told - the rule waits (infinite remainder).  Unless that misfit is itself under
        the limit (a lab whose temperature wanders over a settle of minutes bends it by a pascal or two):
        then the slope bound decides, with the misfit added and the time constant the fit found where it
        is longer than three windows (up to the span fitted: nothing slower can be told from it)."""
        f = self._sfit
        self._unfitted = math.inf
        two = self._sfit2
        if two is not None and self._sfit_current():
            # two relaxations fit where one misfits: their sum at the last sample is what is left, known
            # to its own covariance (what the slope bound below could only bound, stopping early under
            # noise and always on the same side); plus, as for one, what the noise lets the fit hide
            self._unfitted = self._sfit_hidden
            return (abs(two.left) + 2.0 * two.u_left) * self.criteria.remainder_gain + self._unfitted, True
        if not self._sfit_adequate:  # not one relaxation yet: a turning point, or a wandering lab
            misfit = f.residual_sd if f is not None else math.inf
            if f is None or not misfit <= self._remainder_limit(False):
                return math.inf, False
            tau = max(3.0 * self.criteria.window, min(f.tau, self._sfit_span))
            self._unfitted = self._relaxing(self._slope_for(tau)) * tau + misfit
            return self._unfitted, False
        if self._fit_supports(f):
            assert f is not None
            decay = math.exp(-max(self._t_last - f.t_ref, 0.0) / f.tau)
            # plus the misfit the noise lets pass: a second, slower relaxation that small is not seen
            # by the fit, and its remainder is of that size (at 2 Pa without it, the bench's 30 s
            # thermal instrument was covered in 70 % of runs)
            fitted = (abs(f.amplitude) + 2.0 * f.u_amplitude) * decay
            # and a slope the fit of one exponential leaves out, as the slope bound takes one (three
            # windows): 60 Pa relaxing with 40 s under a 2 s relaxation, at 8 Pa of noise, bends the
            # settle less than the noise but falls 0.8 Pa/s (taken 34 Pa off without this)
            self._unfitted = self._sfit_hidden + self._relaxing(self._sfit_line) * 3.0 * self.criteria.window
            # the fitted relaxation times the gain (the zero: what the expansion volume's gas alone may
            # still hold of it); the rest is at the noise floor, which waiting does not lower
            return fitted * self.criteria.remainder_gain + self._unfitted, True
        # the slope bound: three windows, or the settle's own time constant where a sound fit of it
        # finds a longer one it cannot yet pin down (a 50 s relaxation seen over 11 s)
        tau = 3.0 * self.criteria.window
        if f is not None and f.sound:
            tau = max(tau, f.tau)
        self._unfitted = self._relaxing(self._slope_for(tau)) * tau
        return self._unfitted, False

    def _slope_for(self, tau: float) -> float:
        """The slope a bound of |slope| x tau takes: the window's, or, where tau is longer than the
        three windows the window was resolved for, the least-squares slope over the last stretch of the
        settle that resolves it (noise alone leaves slope x tau at most the limit / RESOLVE), up to tau
        itself and the settle so far.

        Why: after an expansion into a slow volume one exponential misfits the settle and the bound
        takes the fit's 60 s time constant; over a 16 s window an 8 Pa gauge's slope carries
        0.13 Pa/s of noise, 8 Pa once times 60 s - the 8 Pa limit within one standard deviation, so a
        gas long within 2 Pa of its end held a hold only by chance and one P2 in 30 ran to max_time
        on the accuracy bench's 30 s thermal instrument.  The longer stretch leans the slope towards
        the relaxation's earlier, steeper part: the bound errs on the safe side."""
        c = self.criteria
        n = len(self._bt)
        if tau <= 3.0 * c.window * (1.0 + 1e-9) or n < 3 or c.u_p is None:
            return self._slope()
        dt = (self._t_last - self._bt[0]) / (n - 1)
        reach = min(tau, self._t_last - self.t0)
        span = resolving_span(n, dt, self._span, self._remainder_limit(False) / tau, c.u_p, reach, self.slope_noise)
        if span <= self._span * (1.0 + 1e-9):
            return self._slope()
        ts = self._all_t
        k = bisect.bisect_left(ts, self._t_last - span * (1.0 + 1e-9))
        if len(ts) - k < 3:
            return self._slope()
        t = np.asarray(ts[k:], dtype=float)
        p = np.asarray(self._all_p[k:], dtype=float)
        t -= t.mean()
        return float(t @ (p - p.mean()) / (t @ t))

    def _relaxing(self, slope: float) -> float:
        """|Pa/s| of a slope that may be relaxation still under way: what exceeds the steady slope the
        criteria allow for the lab (0 unless a gauge transducer reads against an unread lab). Why: a lab
        whose pressure changes 0.08 Pa/s (a fast weather front) moves a quiet gauge reading steadily;
        three windows of it are more than a 2 Pa limit, so no settle of such an instrument decided."""
        return max(abs(slope) - self.criteria.steady_slope, 0.0)

    def _sfit_current(self) -> bool:
        """Whether the settle's latest fit (_fit_settle) is at most fit_interval old."""
        return self._t_last - self._sfit_t <= self.criteria.fit_interval

    def _fit_supports(self, f: ExpFit | None) -> bool:
        return f is not None and f.sound and f.tau <= self._sfit_span and self._sfit_current()

    def _remainder_limit(self, fitted: bool = False) -> float:
        """Pa: max_remainder, or k times a reading's noise where that is larger: neither a window slope
        nor a fit hiding a misfit of the noise's size can show a remainder below it.  For the fit the
        noise is the one measured on its samples (the clean simulator states 21 Pa and has none); for
        the slope bound the stated one.  The budget takes what is left either way.  A fit's own part,
        the relaxation it resolves, is held to max_remainder besides (see _remainder_small)."""
        c = self.criteria
        assert c.max_remainder is not None and c.u_p is not None
        if fitted:  # the noise as measured on the samples fitted: a config may overstate it
            return max(c.max_remainder, c.drift_k * self._sfit_noise)
        return max(c.max_remainder, c.drift_k * c.u_p)

    def _remainder_small(self) -> bool:
        left, fitted = self._remainder()
        self._fitted_now = fitted
        limit = self._remainder_limit(fitted)
        model: ExpFit | TwoExpFit | None = self._sfit2 if self._sfit2 is not None else self._sfit
        tau = model.tau if fitted and model is not None else 3.0 * self.criteria.window
        self._threshold = limit / tau  # the slope that leaves ``limit`` to come: shown as the drift limit
        if not (math.isfinite(left) and left < limit):
            return False
        # where a fit resolves the relaxation, what it still sees to come must be under max_remainder itself:
        # the noise floor in ``limit`` is what the fit cannot see, not room for what it can (held to one
        # reading's 8 Pa, a 30 s thermal bench's P1 and P2 ended 7.4 and 5.7 Pa short of their ends, always
        # on one side, and its calibrations' Vr came out 1.5 standard uncertainties low on average)
        assert self.criteria.max_remainder is not None
        return not fitted or left - self._unfitted < self.criteria.max_remainder

    def _decide(self, status: SettleStatus) -> None:
        self._status = status
        self._decided_at = self._t_last
        value, u_value, slope, u_slope = self._regression()
        how = "regression"
        # one fit at decision time even without extrapolation: its tau tells how much relaxation
        # is left beyond the window (the engine adds |drift|*tau to the estimate's uncertainty)
        extrapolate = self.criteria.extrapolate
        remainder_rule = self.criteria.max_remainder is not None
        current = self._fit_t == self._t_last and (self._fit_precise or not extrapolate)
        fit = self._fit if current else self._refit(precise=extrapolate)
        if remainder_rule:
            fit = self._fit_settle(precise=True)  # the settle's model, polished, on the samples decided on
            left, fitted = self._remainder()
            self._fitted_now = fitted
            two = self._sfit2
            if fitted and two is not None:  # two relaxations: their curve's end, or its asymptote
                self._left = left
                value, u_value = (two.p_inf, two.u_p_inf) if extrapolate else (two.at_last, two.u_at_last)
                how = "extrapolated" if extrapolate else "fitted"
            elif fitted and fit is not None:
                # the window bends: its regression line would miss the end of the curve, so the
                # value is the fit's own at the last sample, or its asymptote when extrapolating (then
                # what it stated is the model's doubt: at most the whole correction applied)
                self._left = left
                at_end = fit.p_inf + fit.amplitude * math.exp(-max(self._t_last - fit.t_ref, 0.0) / fit.tau)
                u_end = fit.u_last if math.isfinite(fit.u_last) else fit.u_p_inf
                value, u_value = (fit.p_inf, fit.u_p_inf) if extrapolate else (at_end, u_end)
                how = "extrapolated" if extrapolate else "fitted"
            elif math.isfinite(left):  # the slope bound (and any misfit it carries), as the rule saw it
                self._left = left
            else:
                self._left = self._unfitted = (abs(slope) * 3.0 * self.criteria.window if math.isfinite(slope)
                                               else math.nan)
        elif extrapolate and fit is not None and fit.sound:
            value, u_value, how = fit.p_inf, fit.u_p_inf, "extrapolated"
        self._frozen = (value, u_value, slope, u_slope, how)

    # -- results -------------------------------------------------------------------------------
    def _current(self) -> tuple[float, float, float, float, str]:
        if self._frozen is not None:
            return self._frozen
        return (*self._regression(), "regression")

    @property
    def status(self) -> SettleStatus:
        return self._status

    @property
    def estimate(self) -> float:
        """The pressure to record (Pa): regression at the window end, or the fitted Pinf."""
        return self._current()[0]

    @property
    def u_estimate(self) -> float:
        """Standard error of ``estimate`` (Pa), from the regression (or fit) residuals."""
        return self._current()[1]

    @property
    def drift(self) -> float:
        """Regression slope over the window (Pa/s)."""
        return self._current()[2]

    @property
    def drift_se(self) -> float:
        return self._current()[3]

    @property
    def method(self) -> str:
        """'regression', 'fitted' (the remainder rule's fit at the last sample) or 'extrapolated'."""
        return self._current()[4]

    @property
    def remainder(self) -> float:
        """Remainder rule: |Pa| the relaxation had still to go after the decision (when the value is
        the fit's asymptote, the correction that took it there), or, before it, has still to go now;
        NaN under the drift rules."""
        if self.criteria.max_remainder is None:
            return math.nan
        if self._frozen is not None:
            return self._left
        return self._remainder()[0] if self._bt else math.nan

    @property
    def remainder_bound(self) -> float:
        """Remainder rule: the bound the budget takes on what the relaxation left reaches the result - the
        decision's ``remainder`` with its unfitted part (the noise floor) times remainder_gain as well:
        the decision cannot wait that part down, but the expansion volume may hold it all the same."""
        left = self.remainder
        gain = self.criteria.remainder_gain
        if gain == 1.0 or not math.isfinite(self._unfitted):
            return left
        return left + (gain - 1.0) * self._unfitted

    @property
    def slowest_tau(self) -> float:
        """Remainder rule: s, the slowest time constant the settle's latest fit resolves (the slower of
        two where two fit), NaN where no fit speaks for the settle or under the drift rules."""
        if self.criteria.max_remainder is None:
            return math.nan
        two = self._sfit2
        if two is not None and self._sfit_current():
            return float(two.tau)
        f = self._sfit
        return float(f.tau) if f is not None and self._fit_supports(f) else math.nan

    @property
    def relaxations(self) -> int:
        """Remainder rule: exponentials in the model the last remainder came from (2 where one misfit and
        two fit, 1 for one, 0 for the slope bound); 0 under the drift rules."""
        if self.criteria.max_remainder is None or not self._fitted_now:
            return 0
        return 2 if self._sfit2 is not None else 1

    @property
    def threshold(self) -> float | None:
        """The drift limit last applied (Pa/s)."""
        return self._threshold

    @property
    def elapsed(self) -> float:
        t = self._decided_at if self._decided_at is not None else self._t_last
        return t - self.t0 if math.isfinite(t) else 0.0

    @property
    def decided_at(self) -> float | None:
        return self._decided_at

    @property
    def window_start(self) -> float:
        """Time of the oldest sample in the window (s; NaN before the first)."""
        return self._bt[0] if self._bt else math.nan

    @property
    def window(self) -> float:
        """The regression window in use (s): the stated one, or the longer one the noise needs."""
        return self._span

    @property
    def n_window(self) -> int:
        return len(self._bt)

    @property
    def shortfall(self) -> str | None:
        """Why the drift test has nothing to judge: 'not settled: too few samples' while the window holds
        fewer than MIN_WINDOW_SAMPLES (a window shorter than two sample periods never holds more, nor does
        one whose readings were invalid), else None.  Why a sentence: the slope and its error are then NaN,
        and a time-out that said 'drift nan Pa/s' told the operator nothing."""
        n = len(self._bt)
        if n >= MIN_WINDOW_SAMPLES:
            return None
        return (f"not settled: too few samples ({n} in the {self._span:g} s window; the drift test needs at "
                f"least {MIN_WINDOW_SAMPLES})")

    @property
    def fit(self) -> ExpFit | None:
        return self._fit

    @property
    def tau(self) -> float | None:
        return self._fit.tau if self._fit is not None else None

    @property
    def p_inf(self) -> float | None:
        return self._fit.p_inf if self._fit is not None else None
