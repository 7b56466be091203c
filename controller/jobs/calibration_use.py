"""Which stored calibration a run computes with, and the warnings about its age and conditions.

Kept apart from the calibration workflow (jobs/calibration.py), which runs measurements and so sits
above jobs/measurement.py; a measurement only needs this lookup, so the two import in one direction.

Age rule.  ASTM D4892 asks for a daily calibration; lab practice for a stable home-built instrument is
often weekly.  The default limit here is 7 days (CalibrationPolicy.max_age), and the warning names
ASTM D4892's daily rule so an operator who works to it can set the limit to 1 day.
"""

from __future__ import annotations

import datetime as _dt
import math
import os
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.domain.units import parse_duration
from pycnoctl.controller.record.catalog import CalibrationRecord, Catalog
from pycnoctl.drivers.instrument import Instrument

AGE_RULE = "ASTM D4892 asks for a daily calibration"


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
                "chi2": (r.payload or {}).get("chi2"), "dof": (r.payload or {}).get("dof"),
                "instrument": r.instrument, "fingerprint": r.fingerprint, "source": r.source}

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


class CalibrationRefused(ValueError):
    """A measurement that has no calibration of this instrument and no stated nominal uncertainty."""


def use_latest_calibration(instrument: Instrument, catalog: Catalog, *, expansion_volume: str, gas: str,
                           fill_target: float | None = None, policy: CalibrationPolicy | None = None,
                           now: _dt.datetime | None = None) -> CalibrationUse:
    """Apply this instrument's calibration of the expansion volume in the gas to instrument.chambers.

    Which one: the operator's choice (``pycnoctl calibrations select``), else the newest in use.  Only
    calibrations made on this instrument (its identity) are candidates: one build's volumes on
    another's run are a silent bias of percents.  Without one the nominal volumes are used with the
    uncertainty the instrument config states; where it states none, CalibrationRefused."""
    policy = policy or CalibrationPolicy.from_env()
    rec, elsewhere = find_calibration(instrument, catalog, expansion_volume=expansion_volume, gas=gas)
    use = CalibrationUse(rec, expansion_volume, gas, policy)
    if rec is None:
        use.warnings.append(
            f"UNCALIBRATED: no calibration of expansion volume {expansion_volume!r} in {gas} on instrument "
            f"{instrument.identity!r}{_elsewhere(elsewhere)}; computing with the nominal volumes of the "
            f"instrument config, each known to {100 * instrument.chambers.nominal_u:g} % (k = 1) as the config "
            "states (run pycnoctl calibrate)")
        return use
    if rec.fingerprint and rec.fingerprint != instrument.fingerprint:
        use.warnings.append(f"calibration {rec.id} was made when this instrument's config differed (chambers, "
                            f"valve roles or transducer reference: {rec.fingerprint} then, {instrument.fingerprint} "
                            "now); if the gas path changed, calibrate again")
    cov = tuple(tuple(float(x) for x in row) for row in (rec.cov or [[0.0, 0.0], [0.0, 0.0]]))
    instrument.chambers = instrument.chambers.model_copy(update={
        "calibrated": {**instrument.chambers.calibrated,
                       expansion_volume: ChamberCalibration(rec.vc, rec.vr, cov, rec.id)}})  # type: ignore[arg-type]
    if rec.gas != gas:  # only by the operator's explicit choice
        use.warnings.append(f"calibration {rec.id} was made in {rec.gas}, this run measures in {gas} "
                            "(chosen by the operator)")
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


def find_calibration(instrument: Instrument, catalog: Catalog, *, expansion_volume: str, gas: str
                     ) -> tuple[CalibrationRecord | None, list[CalibrationRecord]]:
    """The calibration a run would use (changes nothing), and the ones of other instruments that it
    will not.  CalibrationRefused when there is none and the config states no nominal uncertainty:
    the daemon asks this at submit time, so such a run is refused before it is queued."""
    rec = catalog.latest_calibration(expansion_volume, gas, instrument.identity)
    if rec is not None:
        return rec, []
    elsewhere = [c for c in catalog.list_calibrations(expansion_volume=expansion_volume, gas=gas)
                 if c.instrument != instrument.identity]
    if instrument.chambers.nominal_u is None:
        raise CalibrationRefused(
            f"no calibration of expansion volume {expansion_volume!r} in {gas} on instrument "
            f"{instrument.identity!r}{_elsewhere(elsewhere)}, and the instrument config states no "
            "uncertainty of its nominal volumes (chambers: nominal_u): calibrate with pycnoctl calibrate, "
            "import the volumes with pycnoctl calibrations import, or state nominal_u")
    return None, elsewhere


def calibration_brief(instrument: Instrument, catalog: Catalog, *, expansion_volume: str, gas: str,
                      now: _dt.datetime | None = None) -> dict[str, Any]:
    """What a dashboard shows of the calibration a run uses: its id and age, or 'uncalibrated' with
    the nominal volumes' stated uncertainty."""
    rec, _ = find_calibration(instrument, catalog, expansion_volume=expansion_volume, gas=gas)
    if rec is None:
        return {"id": None, "uncalibrated": True, "nominal_u": instrument.chambers.nominal_u}
    age = ((now or _dt.datetime.now(_dt.UTC)) - parse_created(rec.created)).total_seconds() if rec.created else None
    return {"id": rec.id, "uncalibrated": False, "created": rec.created, "gas": rec.gas,
            "age_days": age / 86400.0 if age is not None else None}


def _elsewhere(records: list[CalibrationRecord]) -> str:
    if not records:
        return ""
    made = sorted({r.instrument or "an unknown instrument" for r in records})
    return (f" ({len(records)} made on {', '.join(map(repr, made[:3]))}{' ...' if len(made) > 3 else ''} "
            "are not used here)")


def settle_rules(sequence: Any) -> dict[str, Any]:
    """The settle rules a sequence decides with, per phase, in a form a calibration record keeps."""
    return {phase: getattr(sequence, f"settle_{phase}").model_dump(mode="json")
            for phase in ("baseline", "filled", "expanded")}


def settle_mismatch(record: CalibrationRecord | None, sequence: Any) -> list[str]:
    """A warning when a measurement settles by other rules than its calibration did.

    Why: a settle that stops earlier or later leaves a different part of the thermal relaxation in P1
    and P2; a calibration made under one rule absorbs that rule's bias, which then no longer cancels."""
    stored = ((record.payload or {}) if record is not None else {}).get("settle_rules")
    if not stored:
        return []
    now = settle_rules(sequence)
    changed = [f"{phase} {key} {stored[phase].get(key)!r} -> {now[phase].get(key)!r}"
               for phase in now if phase in stored
               for key in sorted(set(now[phase]) | set(stored[phase]))
               if key not in ("on_timeout",) and now[phase].get(key) != stored[phase].get(key)]
    if not changed:
        return []
    return [f"this sequence settles differently from calibration {record.id} ("  # type: ignore[union-attr]
            f"{'; '.join(changed[:4])}{' ...' if len(changed) > 4 else ''}): its settle bias no longer cancels "
            "against the calibration's; calibrate with the same settle rules"]
