"""The calibration workflow: empty cell and reference spheres -> a checked, versioned chamber calibration.

Why a workflow on top of calibration.py: a volume is only as good as the chamber volumes behind it, so
the steps an operator would otherwise do by hand are kept together here - run the calibration sequence
with the empty cell and with each sphere for every expansion volume, fit Vc and Vr, refuse a fit whose
scatter the pressure noise cannot explain, store the accepted one in the catalog.  Which calibration a
measurement then computes with is jobs/calibration_use.py.

Fit.  Every kept cycle is one point y_i = Vg/Vr (same real-gas, temperature-corrected equation as the
measurement).  A sphere's certificate error is common to all cycles with that sphere, so the points of
one step are correlated; the fit is a generalised least squares with
    C = diag(u_y,i^2) + b^2 * sum_j u(V_j)^2 g_j g_j^T        (g_j: indicator of the cycles of sphere j)
iterated on the slope b.  With no sphere uncertainty it is the plain weighted fit of fit_calibration.
The chi-square r^T C^-1 r against its upper quantile is the refusal test (CalibrationFit.consistent).
"""

from __future__ import annotations

import dataclasses
import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from pycnoctl.controller.domain.units import UnitError, parse_length, parse_volume
from pycnoctl.controller.jobs.calibration_use import settle_rules
from pycnoctl.controller.maths.calibration import (
    CalibrationError,
    CalibrationFit,
    CalibrationRun,
    chi2_quantile,
    fit_calibration,
    sphere_volume,
)
from pycnoctl.controller.record.catalog import CalibrationRecord, Catalog
from pycnoctl.drivers.instrument import Instrument

DEFAULT_SEQUENCE = "calibration"


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
    if "u" not in fields:
        # a sphere without its uncertainty would enter the calibration as exact: its certificate error,
        # the same in every later measurement, would be left out of every budget
        raise ValueError(f"sphere {text!r}: give its certificate's standard uncertainty, u=... (in the unit of "
                         "D or V); a calibration cannot be more certain than its spheres")
    label = fields.get("name", label) or label
    try:
        if "d" in fields:
            d = parse_length(fields["d"])
            u_d = parse_length(fields["u"])
            if d <= 0 or u_d <= 0:
                raise ValueError(f"sphere {text!r}: diameter and its u must be positive")
            v = sphere_volume(d)
            return Sphere(label, v, math.pi * d**2 / 2.0 * u_d, d, u_d, text)
        v = parse_volume(fields["v"])
        u_v = parse_volume(fields["u"])
    except (UnitError, CalibrationError) as exc:
        raise ValueError(f"sphere {text!r}: {exc}") from None
    if v <= 0 or u_v <= 0:
        raise ValueError(f"sphere {text!r}: volume and its u must be positive")
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
    u_p1_relax: float = 0.0  # relaxation each settle left to come: common to a sphere's points
    u_p2_relax: float = 0.0
    u_pa_relax: float = 0.0
    u_t1: float = 0.0  # random parts of the temperatures
    u_t2: float = 0.0
    u_ta: float = 0.0
    r_t: tuple[float, float, float] = (0.0, 0.0, 0.0)  # their correlations (T1-T2, T1-Ta, T2-Ta)


def _r(c: dict[str, Any], key: str) -> float:
    """A stored correlation; 0 where the record predates it or holds none."""
    v = c.get(key)
    return float(v) if v is not None and math.isfinite(v) else 0.0


def points_from_summary(summary: dict[str, Any], step: int, inserted: float, *, u_pa: float = 0.0) -> list[Point]:
    """The kept cycles of one run summary (runs.summarize) as fit points."""
    out = []
    for c in summary.get("cycles", []):
        if not c.get("kept"):
            continue
        pa = c["ambient_pa"]
        # the random parts only (the settle regressions of P1, P2 and the zero): what scatters from
        # point to point; a systematic part common to every point would move the line, not scatter it
        u_zero = c.get("u_baseline_pa")
        u_zero = float(u_zero) if u_zero is not None and math.isfinite(u_zero) else u_pa
        amb1, amb2 = c.get("p1_ambient_pa") or pa, c.get("p2_ambient_pa") or pa  # older records: the zero's
        out.append(Point(step, inserted, amb1 + c["p1_gauge_pa"], amb2 + c["p2_gauge_pa"], pa, c["u_p1_pa"],
                         c["u_p2_pa"], u_zero, c.get("t1_k"), c.get("t2_k"), c.get("ta_k"),
                         summary.get("run_id", ""), int(c["index"]), float(c.get("u_p1_relax_pa") or 0.0),
                         float(c.get("u_p2_relax_pa") or 0.0), float(c.get("u_baseline_relax_pa") or 0.0),
                         float(c.get("u_t1_k") or 0.0), float(c.get("u_t2_k") or 0.0), float(c.get("u_ta_k") or 0.0),
                         (_r(c, "r_t1_t2"), _r(c, "r_t1_ta"), _r(c, "r_t2_ta"))))
    return out


def fit_points(points: Sequence[Point], spheres: Sequence[Sphere], *, gas: str) -> CalibrationFit:
    """Generalised least squares y = a + b V over cycle points (see the module docstring).

    The cycles of one sphere share its certificate error: they are one group of maths.calibration's
    fit, which does the arithmetic."""
    pts = list(points)
    if len(pts) < 2:
        raise CalibrationError(f"need at least 2 kept cycles, got {len(pts)}")
    vols = np.array([p.inserted for p in pts])
    if vols.max() - vols.min() <= 0.0:
        raise CalibrationError("need at least 2 distinct inserted volumes (the empty cell and a sphere)")
    runs = [CalibrationRun(p.p1, p.p2, p.pa, p.inserted, t1=p.t1, t2=p.t2, ta=p.ta,
                           u_inserted=spheres[p.step].u_volume, u_p=p.u_p1, u_p2=p.u_p2, u_pa=p.u_pa, group=p.step,
                           u_p1_relax=p.u_p1_relax, u_p2_relax=p.u_p2_relax, u_pa_relax=p.u_pa_relax,
                           u_t1=p.u_t1, u_t2=p.u_t2, u_ta=p.u_ta, r_t=p.r_t)
            for p in pts]
    return fit_calibration(runs, gas=gas)


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

    Each sphere's true volume is drawn once from its certificate (normal, mean the stated volume, its
    standard uncertainty), as a real sphere differs from its certificate by an unknown amount within it:
    a calibration on the simulator then meets the error its uncertainty claims to cover.  ``actual`` maps
    a sphere label to the volume really placed instead (a mixed-up sphere, or a known draw).  ``seed``
    pins the draws and each step's noise (step i gets seed + i); None: fresh ones.
    """

    def __init__(self, config: Any, *, actual: dict[str, float] | None = None,
                 announce: Callable[[str], None] | None = None, seed: int | None = None) -> None:
        from pycnoctl.sim.bench import fresh_seed
        from pycnoctl.sim.config import SimConfig, load_sim_config

        self.config = config if isinstance(config, SimConfig) else load_sim_config(config)
        self.actual = dict(actual or {})
        self.announce = announce or (lambda text: None)
        self.seed = seed if seed is not None else self.config.seed
        self._rng = np.random.default_rng(self.seed if self.seed is not None else fresh_seed())
        self.placed: dict[str, float] = {}  # label -> the volume really in the cell (the truth)

    @property
    def cell_volume(self) -> float:
        """m^3: the simulated sample cell's true volume (what a sphere must fit)."""
        return float(self.config.volumes[self.config.cell].volume)

    def load(self, index: int, sphere: Sphere) -> Instrument:
        from pycnoctl.drivers.simulated import build_sim_instrument
        from pycnoctl.sim.config import Sample, check

        if sphere.label not in self.placed:
            drawn = float(self._rng.normal(sphere.volume, sphere.u_volume)) if sphere.u_volume > 0 else sphere.volume
            self.placed[sphere.label] = self.actual.get(sphere.label, drawn)
        volume = self.placed[sphere.label]
        # the config's quantity parsers read a bare number in cm^3: give the unit
        sample = Sample(solid_volume=f"{volume!r} m^3")  # type: ignore[arg-type]
        cfg = check(self.config.model_copy(update={"sample": sample}))
        self.announce(f"simulator: {sphere.label} placed in the sample cell" if index else
                      "simulator: sample cell emptied")
        return build_sim_instrument(cfg, seed=None if self.seed is None else self.seed + index)

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

    @property
    def cell_volume(self) -> float:
        """m^3: the sample cell as the instrument config gives it (what a sphere must fit)."""
        return float(self.instrument.chambers.cell)


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
    warnings: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        f = self.fit
        out: dict[str, Any] = {"expansion_volume": self.expansion_volume, "accepted": self.accepted,
                               "reason": self.reason, "record_id": self.record_id, "run_ids": self.run_ids,
                               "warnings": self.warnings}
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
                 "settle_rules": settle_rules(sequence),
                 "residual_test": "too good" if fit.too_good(alpha) else "passed",
                 "method": "GLS of y = Vg/Vr on the inserted volume, sphere errors correlated per step"},
    )


def _same(a: float, b: float) -> bool:
    """One certificate figure however it was spelt: 'u=1 mm3' and 'u=0.001 cm3' differ by the unit
    conversion's rounding (found by a sweep: exact equality let one certificate in twice)."""
    return math.isclose(a, b, rel_tol=1e-9, abs_tol=0.0)


def _named(sphere: Sphere) -> bool:
    return any(part.strip().lower().startswith("name") for part in (sphere.spec or "").split(","))


def sphere_problem(spheres: Sequence[Sphere], cell_volume: float | None) -> str | None:
    """Why these spheres cannot calibrate this cell, or None (found by a sweep):

    * one certificate given twice, unnamed: the same sphere measured twice, its certificate's error taken
      as two independent ones (u(Vc) fell from 0.00288 to 0.00205 cm3 with no word); two spheres that
      share a certificate value are named apart (name=...);
    * a sphere that does not fit the cell (the simulator said only 'solid plus pore volume must be smaller
      than the cell volume'; on hardware the operator would be asked to load it)."""
    for i, a in enumerate(spheres):
        for b in spheres[i + 1:]:
            if _same(a.volume, b.volume) and _same(a.u_volume, b.u_volume) and not (_named(a) and _named(b)):
                return (f"{b.label} repeats {a.label}'s certificate ({a.spec}): the same sphere measured twice "
                        "takes its certificate's error as two independent ones, a smaller uncertainty than it has. "
                        "Give each sphere once, or name two spheres that share a certificate value (name=...)")
    if cell_volume is not None and cell_volume > 0:
        for sph in spheres:
            if sph.volume >= cell_volume:
                return (f"{sph.label} ({sph.volume * 1e6:.5g} cm3) does not fit the sample cell "
                        f"({cell_volume * 1e6:.5g} cm3): a calibration sphere is smaller than the cell")
    return None


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
    should_stop: Callable[[], bool | str] = lambda: False,
) -> CalibrationOutcome:
    """Run the calibration sequence on the empty cell and each sphere, for each expansion volume; fit,
    test and store.  Nothing is stored for a volume whose fit is refused, nor for any once a stop is
    asked (``should_stop``, read before each step and by each run): the running step ends through its
    safe state and its record is closed as aborted."""
    from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
    from pycnoctl.controller.run.control import Controller

    if not spheres:
        raise CalibrationError("give at least one reference sphere")
    steps = [EMPTY, *[s if s.label else dataclasses.replace(s, label=f"sphere {i}")
                      for i, s in enumerate(spheres, 1)]]
    labels = [s.label for s in steps]
    if len(set(labels)) != len(labels):
        raise CalibrationError("sphere names must differ")
    problem = sphere_problem(steps[1:], getattr(loader, "cell_volume", None))
    if problem is not None:
        raise CalibrationError(problem)
    points: dict[str, list[Point]] = {}
    run_ids: dict[str, list[str]] = {}
    seq_model: Any = None
    made_on: tuple[str, str] | None = None  # (identity, fingerprint) of the instrument every step ran on
    for index, sphere in enumerate(steps):
        if stopped := should_stop():
            why = stopped if isinstance(stopped, str) else "stopped"
            return CalibrationOutcome(
                [VolumeOutcome(n, None, False, f"{why} before step {index} ({sphere.label})", run_ids=ids)
                 for n, ids in run_ids.items()],
                "aborted", f"{why} before step {index} ({sphere.label}); nothing stored")
        inst = loader.load(index, sphere)
        try:
            if made_on is None:
                made_on = (inst.identity, inst.fingerprint)
            elif made_on != (inst.identity, inst.fingerprint):
                raise CalibrationError(f"step {index} ran on instrument {inst.identity!r} "
                                       f"({inst.fingerprint}), the steps before on {made_on[0]!r} ({made_on[1]})")
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
                summary = execute(prepared, Controller(inst), root=root, catalog=catalog, should_stop=should_stop)
                run_ids.setdefault(name, []).append(summary["run_id"])
                if summary["status"] != "completed":
                    why = (summary.get("fault") or {}).get("message") or summary.get("abort_reason") or ""
                    ended = f"run {summary['run_id']} {summary['status']}: {why}"
                    return CalibrationOutcome(  # the run named only where it ran; the others never got there
                        [VolumeOutcome(n, None, False, ended if n == name else
                                       f"the calibration ended at {name}, {sphere.label} ({summary['status']})",
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
        if fit.too_good(alpha):
            out.warnings.append(
                f"{name}: the points lie closer to the line than their uncertainties allow (chi-square "
                f"{fit.chi2:.3g} on {fit.dof} degrees of freedom, below its {100 * alpha:g} % limit "
                f"{chi2_quantile(alpha, fit.dof):.3g}): the stated pressure or temperature noise is larger than "
                "the real noise, so the stored covariance is wider than it need be; check the instrument "
                "config's pressure_u and temperature_u")
        if reason is None:
            rec = record_for(fit, name, steps, pts, operator=operator, sequence=seq_model, alpha=alpha,
                             run_ids=run_ids[name])
            assert made_on is not None  # at least the empty-cell step ran
            rec = dataclasses.replace(rec, instrument=made_on[0], fingerprint=made_on[1], source="spheres")
            out.record_id = catalog.put_calibration(rec)
        outcomes.append(out)
    refused = [o for o in outcomes if not o.accepted]
    if refused:
        return CalibrationOutcome(outcomes, "refused", "; ".join(f"{o.expansion_volume}: {o.reason}" for o in refused))
    return CalibrationOutcome(outcomes, "stored")
