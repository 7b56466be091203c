"""Two relaxations at once: p = p_inf + A1 exp(-s/tau1) + A2 exp(-s/tau2), s = t - t[0], tau1 < tau2.

Why: after an expansion into a volume whose gas relaxes more slowly than the cell's (or a fill whose
cell wall and specimen warm at different rates) one exponential leaves a misfit the readings' noise
does not explain, and the settle rule could then only bound what is left by a slope times a time
constant - a bound that noise makes stop early, always on the same side (a 30 s thermal bench's P2
ended 5.7 Pa short of its end at 8 Pa of noise, the bound stating 8 Pa). Two exponentials describe
such a settle to its noise, and their sum at the last sample is the relaxation still to come, with
an uncertainty from the fit's own covariance.

The model is linear in (p_inf, A1, A2) for each pair of time constants, so only the pair is
searched (a log grid, every pair in a few array operations: variable projection), then all five
parameters are polished by Gauss-Newton, whose Jacobian gives the covariance.  Pure numpy.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["TwoExpFit", "fit_two_exponentials"]

_GRID = 48  # log-spaced time constants searched for each of the two (1,128 pairs)
_RATIO = 1.25  # the two time constants must differ by at least this factor to be told apart


@dataclass(frozen=True)
class TwoExpFit:
    """A fitted pair of relaxations; pressures in Pa, times in s."""

    p_inf: float
    u_p_inf: float
    taus: tuple[float, float]  # fast, slow
    amplitudes: tuple[float, float]  # at t_ref
    u_amplitudes: tuple[float, float]
    residual_sd: float
    t_ref: float
    t_last: float
    left: float  # Pa still to come after the last sample: p_inf minus the curve there
    u_left: float  # its standard uncertainty (the whole covariance, time constants included)
    at_last: float  # the curve's value at the last sample
    u_at_last: float
    n: int
    sound: bool  # both relaxations resolved (see fit_two_exponentials)

    @property
    def tau(self) -> float:
        """The slower time constant: the one that decides how long is left."""
        return self.taus[1]


def _pair_grid(s: np.ndarray, y: np.ndarray, taus: np.ndarray) -> tuple[int, int, float]:
    """The pair (i < j) of grid time constants with the least residual sum of squares."""
    n = s.size
    e = np.exp(-s[None, :] / taus[:, None])
    ec = e - np.add.reduce(e, axis=1, keepdims=True) / n
    yc = y - np.add.reduce(y) / n
    g = ec @ ec.T  # Gram matrix of the centred columns
    r = ec @ yc
    d = np.diag(g)
    gi, gj = d[:, None], d[None, :]
    det = gi * gj - g * g
    ri, rj = r[:, None], r[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        b1 = (gj * ri - g * rj) / det
        b2 = (gi * rj - g * ri) / det
        explained = b1 * ri + b2 * rj
    ratio = taus[None, :] / taus[:, None]
    ok = (ratio >= _RATIO) & np.isfinite(explained) & (det > 1e-12 * gi * gj)
    ssr = np.where(ok, float(yc @ yc) - explained, np.inf)
    k = int(np.argmin(ssr))
    i, j = divmod(k, taus.size)
    return i, j, float(ssr[i, j])


def _design(s: np.ndarray, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Model values and Jacobian for p = (c, a1, a2, tau1, tau2)."""
    c, a1, a2, t1, t2 = p
    e1 = np.exp(-s / t1)
    e2 = np.exp(-s / t2)
    jac = np.column_stack([np.ones_like(s), e1, e2, a1 * s / (t1 * t1) * e1, a2 * s / (t2 * t2) * e2])
    return c + a1 * e1 + a2 * e2, jac


def fit_two_exponentials(t: np.ndarray | list[float], p: np.ndarray | list[float]) -> TwoExpFit | None:
    """Least-squares fit of two exponentials and a constant; None where the data cannot carry five
    parameters (fewer than ten points) or the search finds no pair."""
    t_arr = np.asarray(t, dtype=float)
    p_arr = np.asarray(p, dtype=float)
    n = t_arr.size
    if t_arr.shape != p_arr.shape or t_arr.ndim != 1 or n < 10:
        return None
    if not (np.isfinite(t_arr).all() and np.isfinite(p_arr).all()):
        return None
    t_ref = float(t_arr[0])
    s = t_arr - t_ref
    steps = np.diff(s)
    span = float(s[-1])
    if not span > 0 or (steps <= 0).any():
        return None
    p_mid = float(np.add.reduce(p_arr)) / n
    scale = float(p_arr.max() - p_arr.min()) or 1.0
    y = (p_arr - p_mid) / scale
    tau_lo, tau_hi = max(float(steps.min()), span * 1e-3), 10.0 * span
    taus = np.geomspace(tau_lo, tau_hi, _GRID)
    i, j, ssr = _pair_grid(s, y, taus)
    if not math.isfinite(ssr):
        return None
    t1, t2 = float(taus[i]), float(taus[j])
    x = np.column_stack([np.ones(n), np.exp(-s / t1), np.exp(-s / t2)])
    lin = np.linalg.lstsq(x, y, rcond=None)[0]
    par = np.array([lin[0], lin[1], lin[2], t1, t2])
    model, jac = _design(s, par)
    f_best = float((y - model) @ (y - model))
    lam = 1e-3
    for _ in range(30):  # Levenberg-Marquardt: the grid's pair is close, but the two taus trade off
        r = y - model
        a = jac.T @ jac
        try:
            step = np.linalg.solve(a + lam * np.diag(np.diag(a) + 1e-30), jac.T @ r)
        except np.linalg.LinAlgError:
            break
        trial = par + step
        if not (trial[3] > 0 and trial[4] > 0 and math.isfinite(trial[3]) and math.isfinite(trial[4])):
            lam *= 10.0
            continue
        m_new, j_new = _design(s, trial)
        f_new = float((y - m_new) @ (y - m_new))
        if f_new < f_best:
            converged = f_best - f_new <= 1e-10 * f_best + 1e-300
            par, model, jac, f_best = trial, m_new, j_new, f_new
            lam = max(lam / 10.0, 1e-9)
            if converged:
                break
        else:
            lam *= 10.0
            if lam > 1e6:
                break
    if par[3] > par[4]:  # keep the faster first
        par = par[[0, 2, 1, 4, 3]]
        model, jac = _design(s, par)
    dof = n - 5
    resid_sd = math.sqrt(f_best / dof)
    try:
        cov = np.linalg.inv(jac.T @ jac) * (f_best / dof)
    except np.linalg.LinAlgError:
        return None
    c, a1, a2, t1, t2 = (float(v) for v in par)
    e1, e2 = math.exp(-span / t1), math.exp(-span / t2)
    g_last = np.array([1.0, e1, e2, a1 * span / (t1 * t1) * e1, a2 * span / (t2 * t2) * e2])
    g_left = g_last - np.array([1.0, 0.0, 0.0, 0.0, 0.0])  # d(curve at last - p_inf): the same minus dc
    var = np.diag(cov)
    if not np.all(np.isfinite(var)):
        return None
    u = np.sqrt(np.maximum(var, 0.0))

    def su(g: np.ndarray) -> float:
        return scale * math.sqrt(max(float(g @ cov @ g), 0.0))

    u_left, u_p_inf = su(g_left), scale * float(u[0])
    # sound when both relaxations are resolved: time constants apart by _RATIO, the faster above the
    # search floor and the slower within the span fitted (a slower one cannot be told from a line), and
    # finite uncertainties.  Not each amplitude beyond its standard errors: at 8 Pa of noise the two trade
    # off (each within two of its errors of zero) while their sum at the last sample, what the rule needs,
    # is known to 1-2 Pa and within that of the truth (a 30 s thermal bench's P2, 250-450 s into it)
    sound = (t1 > tau_lo and t2 >= _RATIO * t1 * (1.0 - 1e-9) and t2 <= span
             and math.isfinite(u_left) and math.isfinite(u_p_inf))
    return TwoExpFit(
        p_inf=p_mid + scale * c, u_p_inf=u_p_inf, taus=(t1, t2),
        amplitudes=(scale * a1, scale * a2), u_amplitudes=(scale * float(u[1]), scale * float(u[2])),
        residual_sd=scale * resid_sd, t_ref=t_ref, t_last=float(t_arr[-1]),
        left=-scale * (a1 * e1 + a2 * e2), u_left=u_left, at_last=p_mid + scale * float(model[-1]),
        u_at_last=su(g_last), n=n, sound=bool(sound))
