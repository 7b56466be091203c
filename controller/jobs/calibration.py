"""The calibration workflow: empty cell and reference spheres -> a checked, versioned chamber calibration.

Why a workflow on top of calibration.py: a volume is only as good as the chamber volumes behind it, so
the steps an operator would otherwise do by hand are kept together here - run the calibration sequence
with the empty cell and with each sphere for every expansion volume, fit Vc and Vr, refuse a fit whose
scatter the pressure noise cannot explain, store the accepted one in the catalog - and so is the other
half: every measurement computes with the latest calibration of its expansion volume and gas, and warns
when it was taken under other conditions or too long ago.

Fit.  Every kept cycle is one point y_i = Vg/Vr (same real-gas, temperature-corrected equation as the
measurement).  A sphere's certificate error is common to all cycles with that sphere, so the points of
one step are correlated; the fit is a generalised least squares with
    C = diag(u_y,i^2) + b^2 * sum_j u(V_j)^2 g_j g_j^T        (g_j: indicator of the cycles of sphere j)
iterated on the slope b.  With no sphere uncertainty it is the plain weighted fit of fit_calibration.
The chi-square r^T C^-1 r against its upper quantile is the refusal test (CalibrationFit.consistent).

Age rule.  ASTM D4892 asks for a daily calibration; lab practice for a stable home-built instrument is
often weekly.  The default limit here is 7 days (CalibrationPolicy.max_age), and the warning names
ASTM D4892's daily rule so an operator who works to it can set the limit to 1 day.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import os
import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.domain.units import UnitError, parse_duration, parse_length, parse_volume
from pycnoctl.controller.maths.calibration import CalibrationError, CalibrationFit, chi2_quantile, sphere_volume
from pycnoctl.controller.maths.volume import VolumeError, expansion_ratio
from pycnoctl.controller.record.catalog import CalibrationRecord, Catalog
from pycnoctl.drivers.instrument import Instrument

DEFAULT_SEQUENCE = "calibration"
AGE_RULE = "ASTM D4892 asks for a daily calibration"


# ----------------------------------------------------------------------------- reference spheres


@dataclass(frozen=True)
class Sphere:
    """A reference insert of known volume (m^3) and its certificate standard uncertainty."""

    label: str
    volume: float
    u_volume: float
    diameter: float | None = None
    u_diameter: float | None = None
    spec: str = ""

    def as_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


_KEY = re.compile(r"^\s*([A-Za-z]+)\s*=\s*(.+?)\s*$")


def parse_sphere(text: str, label: str = "") -> Sphere:
    """'D=25.400 mm,u=0.002 mm' or 'V=8.5802 cm^3,u=0.0004 cm^3' -> Sphere (u is the standard uncertainty).

    A diameter's uncertainty becomes u(V) = (pi d^2 / 2) u(d) (first-order propagation of pi d^3/6).
    """
    fields: dict[str, str] = {}
    for part in text.split(","):
        if not part.strip():
            continue
        m = _KEY.match(part)
        if not m:
            raise ValueError(f"sphere {text!r}: expected KEY=VALUE parts (D=... or V=..., u=...), got {part!r}")
        key = m.group(1).lower()
        if key in fields:
            raise ValueError(f"sphere {text!r}: {key} given twice")
        fields[key] = m.group(2)
    unknown = set(fields) - {"d", "v", "u", "name"}
    if unknown:
        raise ValueError(f"sphere {text!r}: unknown key(s) {', '.join(sorted(unknown))} (use D, V, u, name)")
    if ("d" in fields) == ("v" in fields):
        raise ValueError(f"sphere {text!r}: give exactly one of D= (diameter) or V= (volume)")
    label = fields.get("name", label) or label
    try:
        if "d" in fields:
            d = parse_length(fields["d"])
            u_d = parse_length(fields["u"]) if "u" in fields else 0.0
            if d <= 0 or u_d < 0:
                raise ValueError(f"sphere {text!r}: diameter must be positive and u not negative")
            v = sphere_volume(d)
            return Sphere(label, v, math.pi * d**2 / 2.0 * u_d, d, u_d, text)
        v = parse_volume(fields["v"])
        u_v = parse_volume(fields["u"]) if "u" in fields else 0.0
    except (UnitError, CalibrationError) as exc:
        raise ValueError(f"sphere {text!r}: {exc}") from None
    if v <= 0 or u_v < 0:
        raise ValueError(f"sphere {text!r}: volume must be positive and u not negative")
    return Sphere(label, v, u_v, spec=text)


EMPTY = Sphere("empty cell", 0.0, 0.0, spec="empty")


# ----------------------------------------------------------------------------- the fit


@dataclass(frozen=True)
class Point:
    """One kept cycle of a calibration run, absolute pressures (Pa) and temperatures (K)."""

    step: int  # index of the sphere (0 = empty cell)
    inserted: float
    p1: float
    p2: float
    pa: float
    u_p1: float
    u_p2: float
    u_pa: float
    t1: float | None
    t2: float | None
    ta: float | None
    run_id: str = ""
    cycle: int = 0


def points_from_summary(summary: dict[str, Any], step: int, inserted: float, *, u_pa: float = 0.0) -> list[Point]:
    """The kept cycles of one run summary (runs.summarize) as fit points."""
    out = []
    for c in summary.get("cycles", []):
        if not c.get("kept"):
            continue
        pa = c["ambient_pa"]
        out.append(Point(step, inserted, pa + c["p1_gauge_pa"], pa + c["p2_gauge_pa"], pa, c["u_p1_pa"],
                         c["u_p2_pa"], u_pa, c.get("t1_k"), c.get("t2_k"), c.get("ta_k"),
                         summary.get("run_id", ""), int(c["index"])))
    return out


def _u_y(p: Point, gas: str) -> float:
    """u(y) from the three pressure readings (central differences, independent readings)."""
    base = [p.p1, p.p2, p.pa]

    def y(v: list[float]) -> float:
        return expansion_ratio(v[0], v[1], v[2], gas=gas, t1=p.t1, t2=p.t2, ta=p.ta)

    var = 0.0
    for i, u in enumerate((p.u_p1, p.u_p2, p.u_pa)):
        if u <= 0.0:
            continue
        h = max(1e-3 * u, 1e-9 * base[i])
        up, dn = list(base), list(base)
        up[i] += h
        dn[i] -= h
        var += ((y(up) - y(dn)) / (2.0 * h) * u) ** 2
    return math.sqrt(var)


def fit_points(points: Sequence[Point], spheres: Sequence[Sphere], *, gas: str) -> CalibrationFit:
    """Generalised least squares y = a + b V over cycle points (see the module docstring)."""
    pts = list(points)
    if len(pts) < 2:
        raise CalibrationError(f"need at least 2 kept cycles, got {len(pts)}")
    vols = np.array([p.inserted for p in pts])
    if vols.max() - vols.min() <= 0.0:
        raise CalibrationError("need at least 2 distinct inserted volumes (the empty cell and a sphere)")
    try:
        ys = np.array([expansion_ratio(p.p1, p.p2, p.pa, gas=gas, t1=p.t1, t2=p.t2, ta=p.ta) for p in pts])
    except VolumeError as exc:
        raise CalibrationError(str(exc)) from exc
    u_yp = np.array([_u_y(p, gas) for p in pts])
    if not np.all(u_yp > 0.0):
        raise CalibrationError("every point needs a pressure uncertainty (the chi-square test compares with it)")
    steps = sorted({p.step for p in pts})
    G = np.array([[1.0 if p.step == s else 0.0 for s in steps] for p in pts])
    u_v = np.array([spheres[s].u_volume for s in steps])
    X = np.column_stack([np.ones_like(vols), vols])
    b = float(np.polyfit(vols, ys, 1)[0])
    for _ in range(30):
        C = np.diag(u_yp**2) + b**2 * (G * u_v**2) @ G.T
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
    res = ys - (a + b * vols)
    chi2 = float(res @ W @ res)
    dof = len(pts) - 2
    J = np.array([[-1.0 / b, a / b**2], [0.0, 1.0 / b**2]])
    cov = J @ cov_ab @ J.T
    t1s = [p.t1 for p in pts if p.t1 is not None]
    return CalibrationFit(
        vc=-a / b, vr=-1.0 / b, cov=cov, cov_scaled=cov * (chi2 / dof if dof > 0 else 1.0), a=a, b=b,
        cov_ab=cov_ab, residuals_y=res, residuals_volume=res / b, u_y=np.sqrt(np.diag(C)), chi2=chi2, dof=dof,
        u_p=None, n_runs=len(pts), gas=gas, mode="sample_first", weighted=True,
        fill_pressure_gauge=float(np.mean([p.p1 - p.pa for p in pts])),
        temperature=float(np.mean(t1s)) if t1s else 293.15,
    )


def refusal_reason(fit: CalibrationFit, alpha: float) -> str | None:
    """Why a fit is refused (None when it is accepted)."""
    if fit.consistent(alpha):
        return None
    crit = chi2_quantile(1.0 - alpha, fit.dof)
    worst = int(np.argmax(np.abs(fit.residuals_y / fit.u_y)))
    return (f"the residuals exceed what the pressure noise explains: chi-square {fit.chi2:.3g} on {fit.dof} "
            f"degrees of freedom, above its {100 * (1 - alpha):g} % limit {crit:.3g} (Birge ratio "
            f"{math.sqrt(fit.chi2_per_dof):.2g}); the worst point is {fit.residuals_y[worst] / fit.u_y[worst]:+.1f} "
            "standard uncertainties off the line. Usual causes: a sphere not the one stated (or its "
            "certificate value), gas not settled, a leak, or a temperature change between steps")


# ----------------------------------------------------------------------------- loading the cell


class CellLoader(Protocol):
    """Puts each step's insert in the sample cell and gives the instrument to run it on."""

    def load(self, index: int, sphere: Sphere) -> Instrument: ...

    def unload(self, instrument: Instrument) -> None: ...


class SimCellLoader:
    """On the simulator the workflow places the sphere itself: a fresh bench with a solid of that volume.

    ``actual`` maps a sphere label to the volume really placed, to simulate a mixed-up sphere.
    """

    def __init__(self, config: Any, *, actual: dict[str, float] | None = None,
                 announce: Callable[[str], None] | None = None) -> None:
        from pycnoctl.sim.config import SimConfig, load_sim_config

        self.config = config if isinstance(config, SimConfig) else load_sim_config(config)
        self.actual = dict(actual or {})
        self.announce = announce or (lambda text: None)

    def load(self, index: int, sphere: Sphere) -> Instrument:
        from pycnoctl.drivers.simulated import build_sim_instrument
        from pycnoctl.sim.config import Sample, check

        volume = self.actual.get(sphere.label, sphere.volume)
        # the config's quantity parsers read a bare number in cm^3: give the unit
        sample = Sample(solid_volume=f"{volume!r} m^3")  # type: ignore[arg-type]
        cfg = check(self.config.model_copy(update={"sample": sample}))
        self.announce(f"simulator: {sphere.label} placed in the sample cell" if index else
                      "simulator: sample cell emptied")
        return build_sim_instrument(cfg)

    def unload(self, instrument: Instrument) -> None:
        instrument.close()


class OperatorCellLoader:
    """Real hardware: ask the operator to load each insert (no prompt with ``prompt=None``, i.e. --yes)."""

    def __init__(self, instrument: Instrument, prompt: Callable[[str], None] | None) -> None:
        self.instrument = instrument
        self.prompt = prompt

    def load(self, index: int, sphere: Sphere) -> Instrument:
        if self.prompt is not None:
            what = "Empty the sample cell" if index == 0 else f"Load {sphere.label} ({sphere.spec})"
            self.prompt(f"{what}, close the cell, then press Enter")
        return self.instrument

    def unload(self, instrument: Instrument) -> None:
        """The instrument stays open for the next step."""


# ----------------------------------------------------------------------------- the workflow


@dataclass
class VolumeOutcome:
    """What the calibration of one expansion volume came to."""

    expansion_volume: str
    fit: CalibrationFit | None
    accepted: bool
    reason: str | None = None
    record_id: str | None = None
    run_ids: list[str] = field(default_factory=list)
    points: list[Point] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        f = self.fit
        out: dict[str, Any] = {"expansion_volume": self.expansion_volume, "accepted": self.accepted,
                               "reason": self.reason, "record_id": self.record_id, "run_ids": self.run_ids}
        if f is not None:
            out.update({"vc_cm3": f.vc * 1e6, "u_vc_cm3": f.u_vc * 1e6, "vr_cm3": f.vr * 1e6,
                        "u_vr_cm3": f.u_vr * 1e6, "corr": f.cov[0, 1] / (f.u_vc * f.u_vr),
                        "chi2": f.chi2, "dof": f.dof, "n_points": f.n_runs,
                        "residuals_volume_cm3": [r * 1e6 for r in f.residuals_volume]})
        return out


@dataclass
class CalibrationOutcome:
    outcomes: list[VolumeOutcome]
    status: str  # 'stored' | 'refused' | 'fault' | 'aborted'
    message: str = ""

    @property
    def ok(self) -> bool:
        return self.status == "stored"


def record_for(fit: CalibrationFit, name: str, spheres: Sequence[Sphere], points: Sequence[Point], *,
               operator: str, sequence: Any, alpha: float, run_ids: Sequence[str]) -> CalibrationRecord:
    """The catalog record of an accepted fit (SI units)."""
    return CalibrationRecord(
        expansion_volume=name, gas=fit.gas, vc=fit.vc, vr=fit.vr, fill_pressure=fit.fill_pressure_gauge,
        temperature=fit.temperature, operator=operator or None, cov=fit.cov.tolist(),
        spheres=[s.as_dict() for s in spheres],
        residuals=[{"run_id": p.run_id, "cycle": p.cycle, "step": p.step, "inserted_m3": p.inserted,
                    "residual_y": float(ry), "u_y": float(uy), "residual_m3": float(rv)}
                   for p, ry, uy, rv in zip(points, fit.residuals_y, fit.u_y, fit.residuals_volume, strict=True)],
        payload={"chi2": fit.chi2, "dof": fit.dof, "alpha": alpha,
                 "chi2_limit": chi2_quantile(1.0 - alpha, fit.dof) if fit.dof > 0 else None,
                 "a": fit.a, "b": fit.b, "cov_ab": fit.cov_ab.tolist(), "n_points": fit.n_runs,
                 "sequence": sequence.name, "fill_target_pa": sequence.fill.target, "run_ids": list(run_ids),
                 "fill_pressure_range_pa": [min(p.p1 - p.pa for p in points), max(p.p1 - p.pa for p in points)],
                 "method": "GLS of y = Vg/Vr on the inserted volume, sphere errors correlated per step"},
    )


def calibrate(
    spheres: Sequence[Sphere],
    loader: CellLoader,
    *,
    catalog: Catalog,
    root: Path,
    expansion_volumes: Sequence[str] | None = None,
    sequence: str | Path = DEFAULT_SEQUENCE,
    operator: str = "",
    alpha: float = 0.01,
    progress: Callable[[str], None] = lambda text: None,
) -> CalibrationOutcome:
    """Run the calibration sequence on the empty cell and each sphere, for each expansion volume; fit,
    test and store.  Nothing is stored for a volume whose fit is refused."""
    from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
    from pycnoctl.controller.run.control import Controller

    if not spheres:
        raise CalibrationError("give at least one reference sphere")
    steps = [EMPTY, *[s if s.label else dataclasses.replace(s, label=f"sphere {i}")
                      for i, s in enumerate(spheres, 1)]]
    labels = [s.label for s in steps]
    if len(set(labels)) != len(labels):
        raise CalibrationError("sphere names must differ")
    points: dict[str, list[Point]] = {}
    run_ids: dict[str, list[str]] = {}
    seq_model: Any = None
    for index, sphere in enumerate(steps):
        inst = loader.load(index, sphere)
        try:
            names = list(expansion_volumes or inst.roles.expansion)
            for name in names:
                req = RunRequest(sequence, sample_id=f"cal:{name}:{sphere.label}", operator=operator,
                                 expansion_volume=name, note=f"calibration step {index}: {sphere.spec}")
                prepared = prepare(req, inst)
                if prepared.sequence.kind != "calibrate":
                    raise CalibrationError(f"sequence {prepared.sequence.name!r} is of kind "
                                           f"{prepared.sequence.kind!r}, not 'calibrate'")
                seq_model = prepared.sequence
                progress(f"{name}: {sphere.label} ...")
                summary = execute(prepared, Controller(inst), root=root, catalog=catalog)
                run_ids.setdefault(name, []).append(summary["run_id"])
                if summary["status"] != "completed":
                    why = (summary.get("fault") or {}).get("message") or summary.get("abort_reason") or ""
                    return CalibrationOutcome(
                        [VolumeOutcome(n, None, False, f"run {summary['run_id']} {summary['status']}: {why}",
                                       run_ids=run_ids.get(n, [])) for n in names],
                        "fault" if summary["status"] == "fault" else "aborted",
                        f"{name}, {sphere.label}: run {summary['run_id']} ended {summary['status']}: {why}")
                pts = points_from_summary(summary, index, sphere.volume, u_pa=0.0)
                points.setdefault(name, []).extend(pts)
                progress(f"{name}: {sphere.label}: {len(pts)} kept cycles (run {summary['run_id']})")
        finally:
            loader.unload(inst)
    outcomes = []
    for name, pts in points.items():
        try:
            fit = fit_points(pts, steps, gas=seq_model.gas)
        except CalibrationError as exc:
            outcomes.append(VolumeOutcome(name, None, False, str(exc), run_ids=run_ids[name], points=pts))
            continue
        reason = refusal_reason(fit, alpha)
        out = VolumeOutcome(name, fit, reason is None, reason, run_ids=run_ids[name], points=pts)
        if reason is None:
            rec = record_for(fit, name, steps, pts, operator=operator, sequence=seq_model, alpha=alpha,
                             run_ids=run_ids[name])
            out.record_id = catalog.put_calibration(rec)
        outcomes.append(out)
    refused = [o for o in outcomes if not o.accepted]
    if refused:
        return CalibrationOutcome(outcomes, "refused", "; ".join(f"{o.expansion_volume}: {o.reason}" for o in refused))
    return CalibrationOutcome(outcomes, "stored")


# ----------------------------------------------------------------------------- using a calibration


@dataclass(frozen=True)
class CalibrationPolicy:
    """When a run warns about its calibration. Environment: PYCNOCTL_CAL_MAX_AGE ('7 d'),
    PYCNOCTL_CAL_FILL_TOLERANCE ('5 %' or 0.05), PYCNOCTL_CAL_TEMPERATURE_TOLERANCE ('2 K')."""

    max_age: float = 7 * 86400.0  # s; ASTM D4892 would have 1 day
    fill_tolerance: float = 0.05  # relative difference of the gauge fill pressure
    temperature_tolerance: float = 2.0  # K

    @classmethod
    def from_env(cls, env: dict[str, str] | None = None) -> CalibrationPolicy:
        env = dict(os.environ if env is None else env)
        kw: dict[str, float] = {}
        if env.get("PYCNOCTL_CAL_MAX_AGE"):
            kw["max_age"] = parse_duration(env["PYCNOCTL_CAL_MAX_AGE"])
        if env.get("PYCNOCTL_CAL_FILL_TOLERANCE"):
            from pycnoctl.controller.domain.units import parse_fraction

            kw["fill_tolerance"] = parse_fraction(env["PYCNOCTL_CAL_FILL_TOLERANCE"])
        if env.get("PYCNOCTL_CAL_TEMPERATURE_TOLERANCE"):
            from pycnoctl.controller.domain.units import parse_temperature_difference

            kw["temperature_tolerance"] = parse_temperature_difference(env["PYCNOCTL_CAL_TEMPERATURE_TOLERANCE"])
        return cls(**kw)


def parse_created(text: str) -> _dt.datetime:
    return _dt.datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=_dt.UTC)


@dataclass
class CalibrationUse:
    """The calibration a run computes with, and the checks of its conditions against the run's."""

    record: CalibrationRecord | None
    expansion_volume: str
    gas: str
    policy: CalibrationPolicy
    warnings: list[str] = field(default_factory=list)

    def describe(self) -> dict[str, Any] | None:
        """What the run summary keeps about the record (None: nominal volumes)."""
        r = self.record
        if r is None:
            return None
        cov = np.asarray(r.cov, dtype=float) if r.cov is not None else np.zeros((2, 2))
        return {"id": r.id, "created": r.created, "expansion_volume": r.expansion_volume, "gas": r.gas,
                "fill_pressure_gauge_pa": r.fill_pressure, "temperature_k": r.temperature, "operator": r.operator,
                "vc_m3": r.vc, "vr_m3": r.vr, "u_vc_m3": math.sqrt(max(cov[0, 0], 0.0)),
                "u_vr_m3": math.sqrt(max(cov[1, 1], 0.0)), "cov": cov.tolist(), "spheres": r.spheres,
                "chi2": (r.payload or {}).get("chi2"), "dof": (r.payload or {}).get("dof")}

    def after_run(self, summary: dict[str, Any]) -> list[str]:
        """Checks that need the run's own readings: measured fill pressure and gas temperature."""
        r = self.record
        if r is None:
            return []
        out = []
        kept = [c for c in summary.get("cycles", []) if c.get("kept")] or summary.get("cycles", [])
        p1s = [c["p1_gauge_pa"] for c in kept if c.get("p1_gauge_pa") is not None]
        t1s = [c["t1_k"] for c in kept if c.get("t1_k") is not None]
        target_warned = any("fill pressure" in w for w in self.warnings)
        if p1s and r.fill_pressure and not target_warned:
            # The settled P1 depends on the load (a fuller cell fills faster and cools more after the
            # fill), so a run is compared with the range of P1 the calibration itself saw.
            p1 = float(np.mean(p1s))
            lo, hi = (r.payload or {}).get("fill_pressure_range_pa") or (r.fill_pressure, r.fill_pressure)
            tol = self.policy.fill_tolerance
            if not lo * (1.0 - tol) <= p1 <= hi * (1.0 + tol):
                seen = f"{lo / 1e5:.4f} bar" if lo == hi else f"{lo / 1e5:.4f}-{hi / 1e5:.4f} bar"
                out.append(f"fill pressure {p1 / 1e5:.4f} bar lies outside the calibration's {seen} by more than "
                           f"{100 * tol:g} %: non-ideality no longer cancels; calibrate at the run's fill pressure")
        if t1s and r.temperature:
            dt = float(np.mean(t1s)) - r.temperature
            if abs(dt) > self.policy.temperature_tolerance:
                out.append(f"gas temperature {float(np.mean(t1s)) - 273.15:.2f} degC differs from the "
                           f"calibration's {r.temperature - 273.15:.2f} degC by {dt:+.2f} K (tolerance "
                           f"{self.policy.temperature_tolerance:g} K)")
        return out


def use_latest_calibration(instrument: Instrument, catalog: Catalog, *, expansion_volume: str, gas: str,
                           fill_target: float | None = None, policy: CalibrationPolicy | None = None,
                           now: _dt.datetime | None = None) -> CalibrationUse:
    """Apply the latest calibration of the expansion volume and gas to instrument.chambers.calibrated.

    Falls back to the latest for the expansion volume in another gas (with a warning), else keeps the
    nominal volumes (with a warning)."""
    policy = policy or CalibrationPolicy.from_env()
    rec = catalog.latest_calibration(expansion_volume, gas)
    use = CalibrationUse(rec, expansion_volume, gas, policy)
    if rec is None:
        others = [c for c in (catalog.latest_calibration(expansion_volume, g) for g in _other_gases(catalog, gas))
                  if c is not None]
        if others:
            rec = max(others, key=lambda c: c.created or "")
            use.record = rec
            use.warnings.append(f"no calibration of {expansion_volume!r} in {gas}; using {rec.id} made in "
                                f"{rec.gas}: the gas differs from the calibration's")
        else:
            use.warnings.append(f"no calibration on record for expansion volume {expansion_volume!r} in {gas}: "
                                "computing with the nominal volumes of the instrument config (run pycnoctl "
                                "calibrate)")
            return use
    cov = tuple(tuple(float(x) for x in row) for row in (rec.cov or [[0.0, 0.0], [0.0, 0.0]]))
    instrument.chambers = instrument.chambers.model_copy(update={
        "calibrated": {**instrument.chambers.calibrated,
                       expansion_volume: ChamberCalibration(rec.vc, rec.vr, cov, rec.id)}})  # type: ignore[arg-type]
    if rec.created:
        age = ((now or _dt.datetime.now(_dt.UTC)) - parse_created(rec.created)).total_seconds()
        if age > policy.max_age:
            use.warnings.append(f"calibration {rec.id} is {age / 86400:.1f} days old (limit "
                                f"{policy.max_age / 86400:g} days; {AGE_RULE})")
    target = (rec.payload or {}).get("fill_target_pa")
    if fill_target is not None and target:
        rel = fill_target / target - 1.0
        if abs(rel) > policy.fill_tolerance:
            use.warnings.append(f"fill pressure target {fill_target / 1e5:.3f} bar differs from the calibration's "
                                f"{target / 1e5:.3f} bar by {100 * rel:+.1f} % (tolerance "
                                f"{100 * policy.fill_tolerance:g} %)")
    return use


def _other_gases(catalog: Catalog, gas: str) -> Iterable[str]:
    from pycnoctl.controller.domain.gas import GASES

    return [g for g in GASES if g != gas]
