"""pycnoctl analyze RUN: recompute a stored run from its raw trace, with no hardware.

RUN is a run ID in the data folder or a run folder. By default the run's own sequence, chamber
volumes and gas are used (and reproduce the stored result); --sequence applies other settle rules,
--calibration ID or --cell-volume/--expansion-volume a newer calibration, --gas another gas model.
The stored record is never changed; --save writes reanalysis.json beside it.
"""

from __future__ import annotations

import argparse
import json
import math
from typing import Any

from pycnoctl.controller.cli.common import add_data_arg, lock_data_folder, resolve_run_folder
from pycnoctl.controller.cli.display import add_output_args, add_units_arg, parse_units
from pycnoctl.controller.cli.main import UsageError


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("analyze", help="recompute a stored run from its raw trace", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("run", help="run ID or run folder")
    add_data_arg(p)
    p.add_argument("--sequence", help="take the settle rules (and discards) from this sequence file instead")
    p.add_argument("--calibration", metavar="ID", help="a calibration record from the catalog")
    p.add_argument("--cell-volume", metavar="V", help="cell volume Vc, e.g. '12.003 cm^3'")
    p.add_argument("--expansion-volume", metavar="V", help="expansion volume Vr, e.g. '8.001 cm^3'")
    p.add_argument("--u-cell-volume", metavar="V", default="0 cm^3",
                   help="standard uncertainty of --cell-volume (default 0 cm^3)")
    p.add_argument("--u-expansion-volume", metavar="V", default="0 cm^3",
                   help="standard uncertainty of --expansion-volume (default 0 cm^3)")
    p.add_argument("--gas", help="gas model for the real-gas correction (default: the run's)")
    add_units_arg(p)
    add_output_args(p, what="the recomputed result (--csv: its cycles)")
    p.add_argument("--save", action="store_true", help="write reanalysis.json into the run folder")
    p.set_defaults(func=main)


def _chambers(args: argparse.Namespace, stored: dict[str, Any], root: Any) -> Any:
    from pycnoctl.controller.domain.gaspath import ChamberCalibration
    from pycnoctl.controller.domain.units import UnitError, parse_volume

    if args.calibration:
        from pycnoctl.controller.record.catalog import Catalog

        with Catalog.for_reading(root / "catalog.sqlite") as cat:
            rec = cat.get_calibration(args.calibration)
        if rec is None:
            raise UsageError(f"--calibration: no calibration {args.calibration!r} in the catalog")
        cov = tuple(tuple(float(x) for x in row) for row in rec.cov) if rec.cov else ((0.0, 0.0), (0.0, 0.0))
        return ChamberCalibration(rec.vc, rec.vr, cov, rec.id)
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
        return ChamberCalibration(vc, vr, ((uc * uc, 0.0), (0.0, ur * ur)), "command line")
    cal = stored.get("calibration") or {}
    cov = cal.get("cov") or ((0.0, 0.0), (0.0, 0.0))
    return ChamberCalibration(float(cal["vc"]), float(cal["vr"]), tuple(tuple(map(float, r)) for r in cov),
                              cal.get("record_id"))


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir, jsonable
    from pycnoctl.controller.maths.cycle import AmbientModel
    from pycnoctl.controller.record.replay import REPLAY_COLUMNS, reanalyze
    from pycnoctl.controller.record.runfolder import load_run
    from pycnoctl.controller.run.sequence import load_sequence, resolve_sequence, sequence_from_text

    units = parse_units(args.units)
    root = data_dir(args.data)
    folder = resolve_run_folder(root, args.run)
    run = load_run(folder, trace_columns=REPLAY_COLUMNS)
    if run.summary is None:
        raise UsageError(f"{folder}: no summary.json (the run was interrupted before it was written); "
                         "pass --sequence and the chamber volumes to analyze its trace")
    stored = run.summary
    seq = load_sequence(resolve_sequence(args.sequence)) if args.sequence else \
        sequence_from_text(stored["sequence_text"], f"{folder}/summary.json: sequence_text")
    inst = stored["instrument"]
    gas = args.gas or stored["results"].get("gas") or inst.get("gas", "helium")
    chambers = _chambers(args, stored, root)
    re = reanalyze(run, seq, chambers=chambers, gas=gas, pressure_is_gauge=bool(inst["pressure_is_gauge"]),
                   pressure_u=float(inst["pressure_u"]), temperature_u=float(inst["temperature_u"]),
                   pressure_u_linearity=inst.get("pressure_u_linearity"),
                   ambient=AmbientModel(bool(inst.get("barometer")), float(inst.get("barometer_u") or 0.0),
                                        float(inst.get("ambient_drift_rate") or 0.0),
                                        bool(inst["pressure_is_gauge"])))
    res = re.result
    out: dict[str, Any] = {
        "run_id": stored["run_id"], "sequence": seq.name, "gas": gas,
        "chambers": {"vc_cm3": chambers.vc * 1e6, "vr_cm3": chambers.vr * 1e6, "source": chambers.record_id},
        "stored_volume_cm3": stored["results"].get("volume_cm3"),
        "volume_cm3": res.volume_m3 * 1e6 if res else None,
        "volume_u_cm3": res.U_volume_m3 * 1e6 if res else None,
        "k": res.k if res else None,
        "cycles": [c.as_dict() for c in re.cycles],
        "flags": re.flags,
    }
    mass = stored["results"].get("mass_g")
    if res and mass:
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
        return 0
    if args.csv:
        import sys

        from pycnoctl.controller.cli.display import write_csv
        from pycnoctl.controller.cli.result_view import cycle_csv_columns, cycle_records

        parsed = {"cycles": {"discard": seq.cycles.discard}}
        write_csv(cycle_records({**out, "sequence": {"parsed": parsed}}, units), cycle_csv_columns(units), sys.stdout)
        return 0
    print(f"run {out['run_id']} re-analysed with sequence {seq.name!r}, gas {gas}, "
          f"Vc {out['chambers']['vc_cm3']:.5f} cm3, Vr {out['chambers']['vr_cm3']:.5f} cm3")
    from pycnoctl.controller.maths.results import WARM_UP

    for c in out["cycles"]:
        mark = "" if c["kept"] else " (warm-up)" if WARM_UP in c["flags"] else " (discarded)"
        print(f"  cycle {c['index']}: P1 {units.p(c['p1_gauge_pa'])}, P2 {units.p(c['p2_gauge_pa'])} {units.p_label}, "
              f"V {c['volume_cm3']:.5f} cm3{mark} {' '.join(c['flags'])}")
    if out["volume_cm3"] is not None:
        print(f"volume: {out['volume_cm3']:.5f} cm3 +/- {out['volume_u_cm3']:.5f} cm3 (expanded U, k = {out['k']:g})")
        if out["stored_volume_cm3"] is not None and math.isfinite(out["stored_volume_cm3"]):
            print(f"stored result: {out['stored_volume_cm3']:.5f} cm3")
    for f in out["flags"]:
        print(f"note: {f}")
    return 0
