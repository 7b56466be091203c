"""Calibration of the cell volume Vc and expansion volume Vr from runs with inserts of known volume.

Why a straight-line fit: for every run the pressures give y = Vg/Vr (see volume.expansion_ratio), and
Vg = Vc - V_inserted, so y = Vc/Vr - V/Vr is linear in the inserted volume.  A weighted least-squares
fit y = a + b V gives Vr = -1/b and Vc = -a/b with a covariance that later measurements carry into
their uncertainty (inverse prediction).  Real gas and temperatures enter through y, so calibrating
and measuring share one equation.

Weights: u(y_i)^2 = sum over the pressure readings (dy/dp u_p)^2 + (b u(V_i))^2, the noise being in
y; b comes from the previous iteration (the fit is repeated until b settles).

Covariance: ``cov`` is propagated from the stated uncertainties only (GUM Type B style, not scaled by
chi-square), so it stays honest when only two or three runs exist.  ``cov_scaled`` multiplies it
by chi2/dof (Birge-ratio scaling) for use when the scatter is believed over the stated noise.
``consistent()`` tells the two apart with a chi-square test.  When no pressure uncertainty is
given at all the fit is unweighted and ``cov`` is estimated from the scatter (needs >= 3 runs).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pycnoctl.controller.domain.gas import Gas, get_gas
from pycnoctl.controller.maths.uncertainty import temperature_pair_covariances
from pycnoctl.controller.maths.volume import VolumeError, expansion_ratio


class CalibrationError(ValueError):
    """Runs that cannot determine Vc and Vr."""


def sphere_volume(diameter_m: float) -> float:
    """Volume of a sphere, pi d^3 / 6, m^3."""
    if not (math.isfinite(diameter_m) and diameter_m > 0.0):
        raise CalibrationError(f"sphere diameter must be positive, got {diameter_m!r} m")
    return math.pi * diameter_m**3 / 6.0


def two_point(r0: float, rk: float, vk: float) -> tuple[float, float]:
    """Closed form from the gauge ratios r = P1g/P2g (ideal gas, sample_first).

    Empty cell r0, insert of volume vk rk: Vc = vk (rk - 1)/(rk - r0), Vr = Vc (r0 - 1).
    """
    if rk == r0:
        raise CalibrationError("empty and loaded runs give the same ratio: the insert is not seen")
    vc = vk * (rk - 1.0) / (rk - r0)
    return vc, vc * (r0 - 1.0)


@dataclass
class CalibrationRun:
    """One expansion with a known volume in the cell (0 for the empty cell).  SI units."""

    p1: float
    p2: float
    pa: float
    inserted_volume: float
    t1: float | None = None
    t2: float | None = None
    ta: float | None = None
    u_inserted: float = 0.0
    u_p: float | None = None  # overrides the fit-wide pressure uncertainty for this run (P1, and P2 unless u_p2)
    u_p2: float | None = None  # P2's own uncertainty, when it differs from P1's
    u_pa: float | None = None  # overrides the fit-wide ambient-pressure uncertainty for this run
    group: int | None = None  # runs of one group share one insert: its certificate error is common to them
    # the relaxation each settle left to come (Pa): the same for the runs of one group (one insert, one
    # fill), so like the certificate error it is common to the group's points, not scatter between them
    u_p1_relax: float = 0.0
    u_p2_relax: float = 0.0
    u_pa_relax: float = 0.0
    # random standard uncertainties of the temperatures (K): a mean of n readings of a noisy thermometer
    u_t1: float = 0.0
    u_t2: float = 0.0
    u_ta: float = 0.0
    # correlations of those errors (T1 with T2, T1 with Ta, T2 with Ta): values of one line through the
    # thermometer's readings share the readings they overlap on
    r_t: tuple[float, float, float] = (0.0, 0.0, 0.0)


def chi2_quantile(p: float, dof: int) -> float:
    """Chi-square quantile: the value that p of the distribution lies below (exact: maths/chisq.py).

    The calibration's residual test compares chi-square with it; an approximation was off by several
    per cent at few degrees of freedom, which is where small calibrations live."""
    if dof <= 0:
        return math.nan
    from pycnoctl.controller.maths.chisq import chi2_ppf

    return chi2_ppf(p, dof)


@dataclass
class CalibrationFit:
    """Result of :func:`fit_calibration`.  Volumes m^3; ``cov`` is for (vc, vr)."""

    vc: float
    vr: float
    cov: np.ndarray
    cov_scaled: np.ndarray
    a: float
    b: float
    cov_ab: np.ndarray
    residuals_y: np.ndarray
    residuals_volume: np.ndarray  # predicted minus known inserted volume, m^3
    u_y: np.ndarray
    chi2: float
    dof: int
    u_p: float | None
    n_runs: int
    gas: str
    mode: str
    weighted: bool
    fill_pressure_gauge: float  # mean p1 - pa over the runs, Pa (calibrate near the run conditions)
    temperature: float  # mean t1 over the runs, K
    notes: list[str] = field(default_factory=list)

    @property
    def chi2_per_dof(self) -> float:
        return self.chi2 / self.dof if self.dof > 0 else math.nan

    @property
    def u_vc(self) -> float:
        return math.sqrt(self.cov[0, 0])

    @property
    def u_vr(self) -> float:
        return math.sqrt(self.cov[1, 1])

    def consistent(self, alpha: float = 0.01) -> bool:
        """True unless chi-square exceeds its upper-alpha quantile (scatter beyond the stated noise).

        With no degrees of freedom (two runs) nothing can be tested and the answer is True; an
        unweighted fit has no stated noise to compare with and is also True.
        """
        if self.dof <= 0 or not self.weighted:
            return True
        return self.chi2 <= chi2_quantile(1.0 - alpha, self.dof)

    def too_good(self, alpha: float = 0.01) -> bool:
        """True when chi-square is below its lower-alpha quantile: the points lie far closer to the line
        than their stated uncertainties allow, so those are overstated (or the data were not measured
        independently); the fit's covariance, built from them, is then too wide.  The other side of
        consistent(): a residual test that can only fail one way cannot show an inflated budget."""
        if self.dof <= 0 or not self.weighted:
            return False
        return self.chi2 < chi2_quantile(alpha, self.dof)

    def predict(self, y: float, u_y: float = 0.0, *, scaled: bool = False) -> tuple[float, float]:
        """Inverse prediction: the volume in the cell that gives ``y``, and its standard uncertainty.

        Includes the calibration covariance; ``u_y`` is the run's own uncertainty in y.
        """
        cov_ab = self.cov_ab * (max(self.chi2_per_dof, 0.0) if scaled and self.dof > 0 else 1.0)
        v = (y - self.a) / self.b
        grad = np.array([-1.0 / self.b, -(y - self.a) / self.b**2])
        var = float(grad @ cov_ab @ grad) + (u_y / self.b) ** 2
        return v, math.sqrt(max(var, 0.0))

    def sample_volume_with_u(
        self,
        p1: float,
        p2: float,
        pa: float,
        *,
        t1: float | None = None,
        t2: float | None = None,
        ta: float | None = None,
        u_p: float = 0.0,
        u_pa: float = 0.0,
        scaled: bool = False,
    ) -> tuple[float, float]:
        """Volume of an unknown from its pressures, with the calibration and pressure uncertainties."""
        y = expansion_ratio(p1, p2, pa, gas=self.gas, t1=t1, t2=t2, ta=ta, mode=self.mode)
        u_y = _u_y_pressures(p1, p2, pa, u_p, u_pa, gas=self.gas, t1=t1, t2=t2, ta=ta, mode=self.mode)
        return self.predict(y, u_y, scaled=scaled)


def _u_y_pressures(p1: float, p2: float, pa: float, u_p: float, u_pa: float, *, u_p2: float | None = None,
                   **kw: Any) -> float:
    """Uncertainty of y from independent pressure readings (central differences)."""
    var = 0.0
    base = (p1, p2, pa)
    for i, u in enumerate((u_p, u_p if u_p2 is None else u_p2, u_pa)):
        if u <= 0.0:
            continue
        h = max(1e-3 * u, 1e-9 * base[i])
        up = list(base)
        dn = list(base)
        up[i] += h
        dn[i] -= h
        d = (expansion_ratio(*up, **kw) - expansion_ratio(*dn, **kw)) / (2.0 * h)
        var += (d * u) ** 2
    return math.sqrt(var)


def _u_y_temperatures(r: CalibrationRun, *, gas: Gas, mode: str) -> float:
    """Uncertainty of y from the run's temperature errors, with their correlations (central differences)."""
    if r.t1 is None:
        return 0.0
    base = {"t1": r.t1, "t2": r.t2, "ta": r.ta}
    cu = {}  # c_i u_i of each temperature, keyed as the volume budget keys them
    for name, u in (("t1", r.u_t1), ("t2", r.u_t2), ("ta", r.u_ta)):
        if not u > 0.0 or base[name] is None:
            continue
        up, dn = dict(base), dict(base)
        up[name] = base[name] + 1e-3 * u  # type: ignore[operator]
        dn[name] = base[name] - 1e-3 * u  # type: ignore[operator]
        d = (expansion_ratio(r.p1, r.p2, r.pa, gas=gas, mode=mode, **up)
             - expansion_ratio(r.p1, r.p2, r.pa, gas=gas, mode=mode, **dn)) / (2e-3 * u)
        cu["T" + name[1:]] = d * u
    var = sum(x * x for x in cu.values()) + sum(v for *_, v in temperature_pair_covariances(cu, r.r_t))
    return math.sqrt(max(var, 0.0))


def fit_calibration(
    runs: Sequence[CalibrationRun],
    *,
    gas: Gas | str = "ideal",
    u_p: float | None = None,
    u_pa: float = 0.0,
    mode: str = "sample_first",
) -> CalibrationFit:
    """Weighted least-squares fit of y = a + b V over the runs; see the module docstring."""
    g = get_gas(gas)
    runs = list(runs)
    if len(runs) < 2:
        raise CalibrationError(f"need at least 2 runs (empty cell and one insert), got {len(runs)}")
    volumes = np.array([float(r.inserted_volume) for r in runs])
    if np.any(volumes < 0.0) or not np.all(np.isfinite(volumes)):
        raise CalibrationError("inserted volumes must be finite and >= 0")
    spread = volumes.max() - volumes.min()
    if spread <= 1e-9 * max(volumes.max(), 1e-12):
        raise CalibrationError(
            "need at least 2 distinct inserted volumes (e.g. empty cell and a sphere); all runs used "
            f"{volumes[0]:.6g} m^3"
        )
    ys = np.empty(len(runs))
    u_yp = np.empty(len(runs))
    for i, r in enumerate(runs):
        try:
            ys[i] = expansion_ratio(r.p1, r.p2, r.pa, gas=g, t1=r.t1, t2=r.t2, ta=r.ta, mode=mode)
        except VolumeError as exc:
            raise CalibrationError(f"run {i}: {exc}") from exc
        up = r.u_p if r.u_p is not None else u_p
        upa = r.u_pa if r.u_pa is not None else u_pa
        u_yp[i] = math.hypot(_u_y_pressures(r.p1, r.p2, r.pa, up or 0.0, upa, u_p2=r.u_p2, gas=g, t1=r.t1,
                                            t2=r.t2, ta=r.ta, mode=mode), _u_y_temperatures(r, gas=g, mode=mode))
    u_ins = np.array([float(r.u_inserted) for r in runs])
    if any(r.group is not None for r in runs):
        u_yr = np.array([_u_y_pressures(r.p1, r.p2, r.pa, r.u_p1_relax, r.u_pa_relax, u_p2=r.u_p2_relax, gas=g,
                                        t1=r.t1, t2=r.t2, ta=r.ta, mode=mode) for r in runs])
        return _fit_grouped(runs, volumes, ys, u_yp, u_ins, gas=g, mode=mode, u_yr=u_yr)
    weighted = bool(np.all(u_yp > 0.0)) or bool(np.all(np.hypot(u_yp, u_ins) > 0.0))
    notes: list[str] = []
    X = np.column_stack([np.ones_like(volumes), volumes])

    # iterate: the insert-volume term of the weights needs the slope b
    b = (ys[-1] - ys[0]) / (volumes[-1] - volumes[0]) if volumes[-1] != volumes[0] else -1.0 / spread
    for _ in range(20):
        u_y = np.hypot(u_yp, b * u_ins)
        if weighted and np.all(u_y > 0.0):
            w = 1.0 / u_y**2
        else:
            weighted = False
            w = np.ones_like(ys)
        xtwx = X.T @ (w[:, None] * X)
        try:
            cov_ab = np.linalg.inv(xtwx)
        except np.linalg.LinAlgError as exc:  # pragma: no cover - guarded by the spread check
            raise CalibrationError("calibration design is singular") from exc
        coef = cov_ab @ (X.T @ (w * ys))
        b_new = float(coef[1])
        if abs(b_new - b) <= 1e-12 * abs(b_new):
            b = b_new
            break
        b = b_new
    a, b = float(coef[0]), float(coef[1])
    if b >= 0.0:
        raise CalibrationError("y does not fall as the inserted volume rises: check the run data/order")
    res = ys - (a + b * volumes)
    dof = len(runs) - 2
    if weighted:
        chi2 = float(np.sum(w * res**2))
    else:
        notes.append("no pressure uncertainty given: unweighted fit, covariance from the scatter")
        s2 = float(np.sum(res**2) / dof) if dof > 0 else math.nan
        cov_ab = cov_ab * s2
        chi2 = math.nan
        u_y = np.full_like(ys, math.sqrt(s2) if dof > 0 else math.nan)
    vc, vr = -a / b, -1.0 / b
    J = np.array([[-1.0 / b, a / b**2], [0.0, 1.0 / b**2]])
    cov = J @ cov_ab @ J.T
    scale = chi2 / dof if (weighted and dof > 0) else 1.0
    t1s = [r.t1 for r in runs if r.t1 is not None]
    return CalibrationFit(
        vc=vc,
        vr=vr,
        cov=cov,
        cov_scaled=cov * scale,
        a=a,
        b=b,
        cov_ab=cov_ab,
        residuals_y=res,
        residuals_volume=res / b,
        u_y=u_y,
        chi2=chi2,
        dof=dof,
        u_p=u_p,
        n_runs=len(runs),
        gas=g.name,
        mode=mode,
        weighted=weighted,
        fill_pressure_gauge=float(np.mean([r.p1 - r.pa for r in runs])),
        temperature=float(np.mean(t1s)) if t1s else 293.15,
        notes=notes,
    )


def _fit_grouped(runs: Sequence[CalibrationRun], volumes: np.ndarray, ys: np.ndarray, u_yp: np.ndarray,
                 u_ins: np.ndarray, *, gas: Gas, mode: str, u_yr: np.ndarray | None = None) -> CalibrationFit:
    """Generalised least squares when runs share an insert (several cycles with one sphere).

    A sphere's certificate error moves every point measured with it the same way, so the points of one
    group are correlated: C = diag(u_y,i^2) + b^2 sum_g u(V_g)^2 g g^T (g: indicator of the group's runs),
    iterated on the slope b. A run without a group is a group of its own.  ``u_yr`` (the y effect of
    the relaxation each settle left to come) is likewise common to a group: + sum_g (u_yr o g)(u_yr o g)^T.
    """
    if not np.all(u_yp > 0.0):
        raise CalibrationError("every point needs a pressure uncertainty (the chi-square test compares with it)")
    keys = [r.group if r.group is not None else ("run", i) for i, r in enumerate(runs)]
    groups = list(dict.fromkeys(keys))
    G = np.array([[1.0 if k == g else 0.0 for g in groups] for k in keys])
    u_v = np.array([u_ins[keys.index(g)] for g in groups])
    X = np.column_stack([np.ones_like(volumes), volumes])
    M = G * (u_yr if u_yr is not None else np.zeros_like(u_yp))[:, None]
    common = M @ M.T
    b = float(np.polyfit(volumes, ys, 1)[0])
    for _ in range(30):
        C = np.diag(u_yp**2) + b**2 * (G * u_v**2) @ G.T + common
        W = np.linalg.inv(C)
        cov_ab = np.linalg.inv(X.T @ W @ X)
        coef = cov_ab @ (X.T @ W @ ys)
        done = abs(coef[1] - b) <= 1e-13 * abs(coef[1])
        b = float(coef[1])
        if done:
            break
    a = float(coef[0])
    if b >= 0.0:
        raise CalibrationError("y does not fall as the inserted volume rises: check which sphere was loaded")
    res = ys - (a + b * volumes)
    chi2 = float(res @ W @ res)
    dof = len(runs) - 2
    J = np.array([[-1.0 / b, a / b**2], [0.0, 1.0 / b**2]])
    cov = J @ cov_ab @ J.T
    t1s = [r.t1 for r in runs if r.t1 is not None]
    return CalibrationFit(
        vc=-a / b, vr=-1.0 / b, cov=cov, cov_scaled=cov * (chi2 / dof if dof > 0 else 1.0), a=a, b=b,
        cov_ab=cov_ab, residuals_y=res, residuals_volume=res / b, u_y=np.sqrt(np.diag(C)), chi2=chi2, dof=dof,
        u_p=None, n_runs=len(runs), gas=gas.name, mode=mode, weighted=True,
        fill_pressure_gauge=float(np.mean([r.p1 - r.pa for r in runs])),
        temperature=float(np.mean(t1s)) if t1s else 293.15,
    )
