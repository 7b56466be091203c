"""pycnoctl analyze RUN: recompute a stored run from its raw trace, with no hardware.

RUN is a run ID in the data folder or a run folder. By default the run's own sequence, chamber
volumes and gas are used (and reproduce the stored result); --sequence applies other settle rules,
--calibration ID or --cell-volume/--expansion-volume a newer calibration, --gas another gas model.
The stored record is never changed; --save writes reanalysis.json beside it.

A run interrupted before its summary.json was written (the process killed, the power lost) is
recomputed from what meta.json kept at its start: the sequence text (--sequence still overrides it),
the gas, the instrument's pressure and temperature facts and the chamber volumes the run computed
with (a calibration's or the config's nominal ones, with their covariance). A run folder whose
meta.json has no volumes (written before it kept them) takes them from the calibration record it
names, in the run's catalog, or needs --cell-volume and --expansion-volume (with --u-cell-volume and
--u-expansion-volume). The output says the run was interrupted, and there is no stored result to
compare with. A run folder from before meta.json kept these facts cannot be recomputed without its
summary.

A trace with no samples is refused; one cut before its first cycle ended gives no volume and says so.

Exit codes: 0 recomputed, 2 bad input or a damaged record, 7 a result no specimen can have (NOT A
MEASUREMENT: below zero or above the sample cell's volume beyond its U), as `pycnoctl run` says it.
"""

from __future__ import annotations

import argparse
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pycnoctl.controller.cli.common import add_data_arg, lock_data_folder, resolve_run_folder
from pycnoctl.controller.cli.display import add_output_args, add_units_arg, parse_units
from pycnoctl.controller.cli.main import UsageError

if TYPE_CHECKING:  # the modules themselves are imported where they are used, after the command line is read
    from pycnoctl.controller.domain.gaspath import ChamberCalibration
    from pycnoctl.controller.record.catalog import CalibrationRecord
    from pycnoctl.controller.record.runfolder import StoredRun
    from pycnoctl.controller.run.sequence import Sequence


_NO_U = "0 cm^3"  # the volume uncertainties' default: volumes given without them are taken as exact (and said so)


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("analyze", help="recompute a stored run from its raw trace", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("run", help="run ID or run folder")
    add_data_arg(p)
    p.add_argument("--sequence", help="take the settle rules (and discards) from this sequence file instead")
    p.add_argument("--calibration", metavar="ID", help="a calibration record from the catalog")
    p.add_argument("--cell-volume", metavar="V", help="cell volume Vc, e.g. '12.003 cm^3'")
    p.add_argument("--expansion-volume", metavar="V", help="expansion volume Vr, e.g. '8.001 cm^3'")
    p.add_argument("--u-cell-volume", metavar="V", default=_NO_U,
                   help="standard uncertainty of --cell-volume (default 0 cm^3)")
    p.add_argument("--u-expansion-volume", metavar="V", default=_NO_U,
                   help="standard uncertainty of --expansion-volume (default 0 cm^3)")
    p.add_argument("--gas", help="gas model for the real-gas correction (default: the run's)")
    add_units_arg(p)
    add_output_args(p, what="the recomputed result (--csv: its cycles)")
    p.add_argument("--save", action="store_true", help="write reanalysis.json into the run folder")
    p.set_defaults(func=main)


#: The instrument facts a recomputation cannot do without (the others have a neutral default)
_NEEDED_FACTS = ("pressure_is_gauge", "pressure_u", "temperature_u")

#: What the output says when the trace holds no complete cycle of an expanding sequence
NO_COMPLETE_CYCLE = "no complete cycle was found in the trace, so there is no volume"
#: ... and when cycles ended but none of them counts
NO_KEPT_CYCLE = "no kept cycle: no volume (each cycle's line says why it was left out)"


@dataclass
class Recorded:
    """What the run folder says about the run: from summary.json for a run that reached its end, else
    from the facts meta.json has kept since the run's start (an interrupted run)."""

    run_id: str
    interrupted: bool
    instrument: dict[str, Any] | None  # None: not recorded (a run folder from before meta.json kept it)
    sequence_text: str | None
    sequence_source: str  # where the text is kept, for the position of a problem in it
    gas: str | None
    mass_g: float | None
    calibration: dict[str, Any] | None  # the chambers as the run computed with them (summary, else meta.json)
    calibration_id: str | None  # the calibration record an interrupted run computed with (None: nominal)
    stored_volume_cm3: float | None  # the result the run stored (None: it stored none)
    expansion_volume: str | None = None  # the expansion volume the run expanded into (None: not recorded)
    stored_n_kept: int | None = None  # how many cycles that result is the mean of (None: not stored)

    @classmethod
    def from_run(cls, run: StoredRun, folder: Path) -> Recorded:
        if run.summary is not None:
            doc = run.summary
            inst, results = doc["instrument"], doc["results"]
            return cls(doc["run_id"], False, inst, doc["sequence_text"], f"{folder}/summary.json: sequence_text",
                       results.get("gas") or inst.get("gas"), results.get("mass_g"), doc.get("calibration") or {},
                       None, results.get("volume_cm3"), results.get("expansion_volume"), _n_kept(results))
        meta = run.meta.get("meta") or {}
        facts = meta.get("instrument")
        if not (isinstance(facts, dict) and all(k in facts for k in _NEEDED_FACTS)):
            facts = None
        return cls(run.meta.get("run_id") or folder.name, True, facts, meta.get("sequence_text") or None,
                   f"{folder}/meta.json: sequence_text", meta.get("gas") or (facts or {}).get("gas"),
                   meta.get("mass_g"), meta.get("calibration") if isinstance(meta.get("calibration"), dict) else None,
                   meta.get("calibration_id"), None, meta.get("expansion_volume"))


def _n_kept(results: dict[str, Any]) -> int | None:
    """How many cycles the stored result is the mean of: its n_kept, else counted from its cycles."""
    n = results.get("n_kept")
    if isinstance(n, int) and not isinstance(n, bool):
        return n
    cycles = results.get("cycles")
    return sum(1 for c in cycles if c.get("kept") is True) if isinstance(cycles, list) and cycles else None


def _chambers(args: argparse.Namespace, rec: Recorded, root: Path, folder: Path
              ) -> tuple[ChamberCalibration | None, str | None]:
    """The chamber volumes to compute with, or (None, what to pass) when nothing gives them: the
    command line first, then what the run computed with (its summary, else the record meta.json names)."""
    from pycnoctl.controller.domain.gaspath import ChamberCalibration
    from pycnoctl.controller.domain.units import UnitError, parse_volume

    given_u = [f"--{k.replace('_', '-')}" for k in ("u_cell_volume", "u_expansion_volume")
               if getattr(args, k) != _NO_U]
    if args.calibration and (args.cell_volume or args.expansion_volume or given_u):
        # found by a sweep: the volumes were silently ignored beside a calibration
        raise UsageError("--calibration gives the chamber volumes and their uncertainties: give it, or "
                         "--cell-volume and --expansion-volume (with their --u-...), not both")
    if given_u and not (args.cell_volume or args.expansion_volume):
        raise UsageError(f"{' and '.join(given_u)} go with --cell-volume and --expansion-volume (were ignored)")
    if args.calibration:
        from pycnoctl.controller.record.catalog import Catalog

        with Catalog.for_reading(root / "catalog.sqlite") as cat:
            found = cat.get_calibration(args.calibration)
        if found is None:
            raise UsageError(f"--calibration: no calibration {args.calibration!r} in the catalog")
        wrong = _not_for_this_run(found, rec, args.gas)
        if wrong is not None:
            raise UsageError(f"--calibration: calibration {found.id} {wrong}")
        return _from_record(found), None
    if args.cell_volume or args.expansion_volume:
        if not (args.cell_volume and args.expansion_volume):
            raise UsageError("--cell-volume and --expansion-volume go together")
        try:
            vc, vr = parse_volume(args.cell_volume), parse_volume(args.expansion_volume)
            uc, ur = parse_volume(args.u_cell_volume), parse_volume(args.u_expansion_volume)
        except UnitError as exc:
            raise UsageError(f"--cell-volume/--expansion-volume: {exc}") from None
        if vc <= 0 or vr <= 0:
            raise UsageError("--cell-volume/--expansion-volume: volumes must be positive")
        if not (uc >= 0 and ur >= 0):  # was taken by its magnitude
            raise UsageError("--u-cell-volume/--u-expansion-volume: an uncertainty is zero or positive")
        for flag, v, u in (("--u-cell-volume", vc, uc), ("--u-expansion-volume", vr, ur)):
            if u >= 0.5 * v:  # as `calibrations import` refuses it (1000 cm3 on a 12 cm3 cell was taken)
                raise UsageError(f"{flag}: {u * 1e6:g} cm3 is not an uncertainty of a {v * 1e6:g} cm3 volume")
        return ChamberCalibration(vc, vr, ((uc * uc, 0.0), (0.0, ur * ur)), "command line"), None
    give = ("the chamber volumes: --cell-volume V and --expansion-volume V (their uncertainties with "
            "--u-cell-volume and --u-expansion-volume), or --calibration ID")
    if rec.calibration is not None:
        cal = rec.calibration
        return ChamberCalibration(float(cal["vc"]), float(cal["vr"]), _cov(cal.get("cov")), cal.get("record_id")), None
    if rec.calibration_id is None:
        return None, f"{give} (meta.json names no calibration record: the run computed with the nominal volumes)"
    # the record the run named lives in the catalog of the data folder the run is in
    from pycnoctl.controller.record.runfolder import catalog_beside

    catalog_path = catalog_beside(folder)
    found = None
    if catalog_path is not None:
        from pycnoctl.controller.record.catalog import Catalog

        with Catalog.for_reading(catalog_path) as cat:
            found = cat.get_calibration(rec.calibration_id)
    if found is None:
        why = f"is not in {catalog_path}" if catalog_path is not None else \
            "cannot be looked up: there is no catalog beside this run folder"
        return None, f"{give} (the calibration {rec.calibration_id} that meta.json names {why})"
    return _from_record(found), None


def _not_for_this_run(found: CalibrationRecord, rec: Recorded, gas: str | None) -> str | None:
    """Why a calibration named on the command line cannot give this run's volumes, or None: made on
    another instrument, of another expansion volume or in another gas (the run itself refuses these:
    found by a sweep, 'analyze --calibration' took another instrument's and stated 4.325 cm3 for 5.000),
    or retired, unless it is the one the run computed with."""
    from pycnoctl.controller.domain.gas import UnknownGas, get_gas

    identity = (rec.instrument or {}).get("identity")
    if found.instrument is not None and identity is not None and found.instrument != identity:
        return f"was made on instrument {found.instrument!r}, and this run on {identity!r}"
    if rec.expansion_volume is not None and found.expansion_volume != rec.expansion_volume:
        return (f"is of expansion volume {found.expansion_volume!r}, and this run expanded into "
                f"{rec.expansion_volume!r}")
    run_gas = gas or rec.gas
    if run_gas is not None:
        try:
            same = get_gas(found.gas).name == get_gas(run_gas).name
        except UnknownGas:
            same = found.gas.strip().lower() == run_gas.strip().lower()
        if not same:
            return (f"was made in {found.gas}, and this run is analysed in {run_gas}" if gas else
                    f"was made in {found.gas}, and this run is in {run_gas}")
    used = (rec.calibration or {}).get("record_id") or rec.calibration_id
    if found.retired is not None and found.id != used:
        return (f"is retired ({found.retired}); a retired calibration re-analyses only the runs that computed "
                "with it")
    return None


def _exact_note(c: ChamberCalibration) -> str | None:
    """What to say next to a result whose chamber volumes carry no uncertainty, or None: the U would
    leave the calibration out and look smaller than it is."""
    from pycnoctl.controller.cli.exactness import exact_volumes

    (a, _), (_, d) = c.cov
    if c.record_id == "command line":
        return exact_volumes(a, d)
    if a <= 0.0 and d <= 0.0:
        whose = f"calibration {c.record_id}" if c.record_id else "the run's record"
        return f"chamber volumes taken as exact: {whose} keeps no uncertainty for them"
    return None


def _usable(c: ChamberCalibration) -> bool:
    """Volumes a recomputation can take: positive, finite, with a covariance that can be one
    (domain.gaspath.covariance_problem, the rule a stored summary is read by)."""
    from pycnoctl.controller.domain.figures import covariance_problem, is_number

    return is_number(c.vc) and is_number(c.vr) and c.vc > 0 and c.vr > 0 and covariance_problem(c.cov) is None


def _from_record(found: CalibrationRecord) -> ChamberCalibration:
    """A catalog record as the volumes a recomputation takes (a record without covariance: exact)."""
    from pycnoctl.controller.domain.gaspath import ChamberCalibration

    return ChamberCalibration(found.vc, found.vr, _cov(found.cov), found.id)


def _cov(rows: Any) -> tuple[tuple[float, float], tuple[float, float]]:
    """The 2x2 covariance of (Vc, Vr) as stored; none stored: the volumes are taken as exact."""
    if not rows:
        return (0.0, 0.0), (0.0, 0.0)
    (a, b), (c, d) = rows
    return (float(a), float(b)), (float(c), float(d))


def _refuse_short_windows(seq: Sequence, t: Any) -> None:
    """A settle window the trace's samples cannot fill is refused at its line, as `run` refuses it.

    Without this every settle of the recomputation said "not settled: too few samples" and the
    command ended with no volume and exit 0.  The sample period is the trace's own (its median step):
    the record is what the windows are applied to, whatever instrument wrote it."""
    import numpy as np

    from pycnoctl.controller.domain.yamlio import ConfigError, Problem
    from pycnoctl.controller.run.sequence import window_rules

    steps = np.diff(np.asarray(t, dtype=float))
    steps = steps[np.isfinite(steps) & (steps > 0)]
    if steps.size == 0:
        return
    rules = window_rules(seq, float(np.median(steps)))
    if rules:
        raise ConfigError([seq.doc.problem(loc, msg) if seq.doc is not None else Problem(seq.name, 1, 1, msg)
                           for loc, msg in rules])


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir, jsonable
    from pycnoctl.controller.maths.cycle import AmbientModel
    from pycnoctl.controller.record.replay import REPLAY_COLUMNS, reanalyze
    from pycnoctl.controller.record.runfolder import load_run
    from pycnoctl.controller.run.sequence import load_sequence, resolve_sequence, sequence_from_text

    units = parse_units(args.units)
    root = data_dir(args.data)
    folder = resolve_run_folder(root, args.run)
    try:  # a record damaged or edited by hand: one line naming it, never a traceback
        run = load_run(folder, trace_columns=REPLAY_COLUMNS)
        if run.n_samples == 0:
            raise UsageError(f"{folder / 'trace.csv'}: the trace has no samples (an empty file, or its header "
                             "only); there is nothing to analyze")
        rec = Recorded.from_run(run, folder)
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise UsageError(f"{folder}: the run's record cannot be read ({type(exc).__name__}: {exc}); its trace.csv, "
                         "meta.json or summary.json is damaged") from None
    cut = f"{folder}: no summary.json (the run was interrupted before it was written)"
    if rec.instrument is None:
        raise UsageError(f"{cut}, and its meta.json does not keep the instrument's facts a recomputation needs "
                         "(gauge or absolute pressure, the pressure and temperature uncertainties, the barometer): "
                         "it was written before meta.json kept them, and this run cannot be recomputed")
    try:
        chambers, give_chambers = _chambers(args, rec, root, folder)
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise UsageError(f"{folder}: the chamber volumes the record keeps cannot be read ({type(exc).__name__}: "
                         f"{exc}); pass --cell-volume and --expansion-volume, or --calibration ID") from None
    if chambers is not None and not _usable(chambers):
        raise UsageError(f"{folder}: the chamber volumes the record keeps are not usable (Vc {chambers.vc!r}, Vr "
                         f"{chambers.vr!r} m3, covariance {chambers.cov!r}: volumes must be positive, variances "
                         "zero or positive); pass --cell-volume and --expansion-volume, or --calibration ID")
    give = [g for g in ("the sequence: --sequence FILE (meta.json keeps no sequence text)"
                        if not (args.sequence or rec.sequence_text) else None, give_chambers) if g]
    if give or chambers is None:
        raise UsageError(f"{cut}; to analyze its trace, pass {'; and '.join(give)}")
    seq = load_sequence(resolve_sequence(args.sequence)) if args.sequence else \
        sequence_from_text(rec.sequence_text or "", rec.sequence_source)
    _refuse_short_windows(seq, run.trace["t"])
    inst = rec.instrument
    gas = args.gas or rec.gas or "helium"
    from pycnoctl.controller.domain.gas import UnknownGas, get_gas

    try:
        get_gas(gas)
    except UnknownGas as exc:
        raise UsageError(f"{'--gas' if args.gas else f'{folder}: the gas the record names'}: {exc}") from None
    if not all(isinstance(inst.get(k), int | float) for k in ("pressure_u", "temperature_u")):
        raise UsageError(f"{folder}: the instrument facts the record keeps lack a number for pressure_u or "
                         "temperature_u; the record is damaged")
    re = reanalyze(run, seq, chambers=chambers, gas=gas, pressure_is_gauge=bool(inst["pressure_is_gauge"]),
                   pressure_u=float(inst["pressure_u"]), temperature_u=float(inst["temperature_u"]),
                   pressure_u_linearity=inst.get("pressure_u_linearity"),
                   ambient=AmbientModel(bool(inst.get("barometer")), float(inst.get("barometer_u") or 0.0),
                                        float(inst.get("ambient_drift_rate") or 0.0),
                                        bool(inst["pressure_is_gauge"])),
                   thermometer=bool(inst.get("thermometer")))
    res = re.result
    flags = list(re.flags)
    if seq.expands and not re.cycles:
        flags.append(NO_COMPLETE_CYCLE)
    elif seq.expands and res is None:
        flags.append(NO_KEPT_CYCLE)
    n_kept = sum(1 for c in re.cycles if c.kept)
    if seq.expands and rec.stored_n_kept is not None and n_kept != rec.stored_n_kept:
        # a trace cut short (or other rules) gives a mean of other cycles than the stored result's
        same = ": its volume is not the mean of the same cycles as the stored result" if res else ""
        flags.append(f"this recomputation keeps {n_kept} cycle{'s' * (n_kept != 1)} where the run kept "
                     f"{rec.stored_n_kept}{same}")
    from pycnoctl.controller.maths.verdict import EXIT_NOT_A_MEASUREMENT, not_a_measurement, outside_cell

    impossible = outside_cell(res.volume_m3, res.U_volume_m3, chambers.vc) if res else None
    verdict = not_a_measurement(impossible) if impossible else None
    if verdict:  # as the run says it, with its exit code: these volumes give a result no specimen can have
        flags.append(verdict)
    code = EXIT_NOT_A_MEASUREMENT if verdict else 0
    exact = _exact_note(chambers) if res else None
    if exact:
        flags.append(exact)
    out: dict[str, Any] = {
        "run_id": rec.run_id, "interrupted": rec.interrupted, "sequence": seq.name, "gas": gas,
        "chambers": {"vc_cm3": chambers.vc * 1e6, "vr_cm3": chambers.vr * 1e6, "source": chambers.record_id},
        "stored_volume_cm3": rec.stored_volume_cm3, "stored_n_kept": rec.stored_n_kept, "n_kept": n_kept,
        "volume_cm3": res.volume_m3 * 1e6 if res else None,
        "volume_u_cm3": res.U_volume_m3 * 1e6 if res else None,
        "k": res.k if res else None,
        "cycles": [c.as_dict() for c in re.cycles],
        "flags": flags,
    }
    mass = rec.mass_g
    if res and mass and res.volume_m3 > 0:  # no density of a volume at or below zero (NOT A MEASUREMENT)
        from pycnoctl.controller.maths.uncertainty import density

        rho, u_rho = density(res.volume_m3, res.u_volume_m3, mass * 1e-3, 0.0)
        out["density_g_cm3"], out["density_u_g_cm3"] = rho / 1e3, res.k * u_rho / 1e3
    out = jsonable(out)
    if args.save:  # a write into a data folder: only with its writer lock (refused while another writer lives)
        owner = folder.parent.parent if folder.parent.name == "runs" else None
        lock = lock_data_folder(owner, "analyze --save", mark_interrupted=False) if owner is not None else None
        try:
            (folder / "reanalysis.json").write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
        finally:
            if lock is not None:
                lock.release()
    if args.json:
        print(json.dumps(out, indent=2))
        return code
    if args.csv:
        import sys

        from pycnoctl.controller.cli.display import write_csv
        from pycnoctl.controller.cli.result_view import cycle_csv_columns, cycle_records

        parsed = {"cycles": {"discard": seq.cycles.discard}}
        write_csv(cycle_records({**out, "sequence": {"parsed": parsed}}, units), cycle_csv_columns(units), sys.stdout)
        if verdict:  # the cycles table does not carry it
            print(f"pycnoctl analyze: {verdict}", file=sys.stderr)
        return code
    print(f"run {out['run_id']} re-analysed with sequence {seq.name!r}, gas {gas}, "
          f"Vc {out['chambers']['vc_cm3']:.5f} cm3, Vr {out['chambers']['vr_cm3']:.5f} cm3")
    if rec.interrupted:
        print("INTERRUPTED: the run ended before its summary was written; this is its trace as far as it goes, "
              "and there is no stored result to compare with")
    from pycnoctl.controller.maths.results import WARM_UP

    for c in out["cycles"]:
        volume = c["volume_cm3"]  # None: the cycle gave no volume (its flags say why)
        mark = ("" if c["kept"] else " (warm-up)" if WARM_UP in c["flags"] else
                " (no volume)" if volume is None else " (discarded)")
        shown = "V —" if volume is None else f"V {volume:.5f} cm3"
        print(f"  cycle {c['index']}: P1 {units.p(c['p1_gauge_pa'])}, P2 {units.p(c['p2_gauge_pa'])} {units.p_label}, "
              f"{shown}{mark} {' '.join(c['flags'])}")
    if out["volume_cm3"] is not None:
        print(f"volume: {out['volume_cm3']:.5f} cm3 +/- {out['volume_u_cm3']:.5f} cm3 (expanded U, k = {out['k']:g})")
        if verdict:  # right under the number, as `run` shows it, never only as a note further down
            print(verdict)
        if exact:  # next to the U it concerns
            print(f"note: {exact}")
        if out["stored_volume_cm3"] is not None and math.isfinite(out["stored_volume_cm3"]):
            print(f"stored result: {out['stored_volume_cm3']:.5f} cm3")
    for f in out["flags"]:
        if f not in (verdict, exact):
            print(f"note: {f}")
    return code
