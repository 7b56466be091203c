"""pycnoctl calibrate: measure the chamber volumes with the empty cell and reference spheres.

For each step (empty cell, then each --sphere) and each expansion volume the calibration sequence runs
once; Vc and Vr are fitted by weighted least squares and the calibration is stored in the catalog only
if its residuals are what the pressure noise explains (chi-square test).  Later runs compute with the
latest stored calibration of their expansion volume and gas.

Volumes in cm3 with standard uncertainties (k = 1); the table never cuts a figure (on a narrow
terminal it leaves out the less important columns and says which; --csv and --json have all).

Exit codes: 0 stored, 2 bad input, 3 a run faulted, 4 aborted, 6 refused (residuals too large).
Ctrl-C, a kill (SIGTERM) or a closed terminal (SIGHUP) ends the running step through the safe state,
closes its record as aborted and stores no calibration.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from pycnoctl.controller.cli.common import add_data_arg, add_instrument_args, lock_data_folder, plain_arg, stop_requests
from pycnoctl.controller.cli.display import add_output_args
from pycnoctl.controller.cli.main import UsageError

EXIT = {"stored": 0, "fault": 3, "aborted": 4, "refused": 6}
CSV_COLUMNS = ["expansion_volume", "accepted", "record_id", "vc_cm3", "u_vc_cm3", "vr_cm3", "u_vr_cm3", "corr", "chi2",
               "dof", "n_points", "reason", "run_ids", "residuals_volume_cm3"]


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("calibrate", help="calibrate the chamber volumes with reference spheres",
                       description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    add_instrument_args(p, realtime=False)  # the simulated workflow runs as fast as it can
    add_data_arg(p)
    p.add_argument("--sphere", action="append", default=[], metavar="SPEC", required=True,
                   help="a reference sphere by diameter or volume with its certificate standard uncertainty, "
                        "e.g. 'D=25.400 mm,u=0.002 mm' or 'V=8.5802 cm^3,u=0.0004 cm^3' (optional name=...); "
                        "repeat for several")
    p.add_argument("--expansion-volume", action="append", metavar="NAME",
                   help="calibrate only this expansion volume (repeatable; default all)")
    p.add_argument("--sequence", default="calibration", help="calibration sequence (default: the shipped one)")
    p.add_argument("--operator", default="", type=plain_arg, help="who calibrated, for the record")
    p.add_argument("--alpha", type=float, default=0.01,
                   help="significance of the chi-square refusal test (default 0.01)")
    p.add_argument("--yes", action="store_true", help="no prompts between steps (the cell is loaded already)")
    add_output_args(p, what="the outcome (--csv: one line per expansion volume)")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.calibration import parse_sphere
    from pycnoctl.controller.jobs.measurement import data_dir

    try:
        spheres = [parse_sphere(s, f"sphere {i}") for i, s in enumerate(args.sphere, 1)]
    except ValueError as exc:
        raise UsageError(f"--sphere: {exc}") from None
    if not 0.0 < args.alpha < 0.5:
        raise UsageError("--alpha must lie between 0 and 0.5")
    say = (lambda text: None) if (args.json or args.csv) else (lambda text: print(text, file=sys.stderr))
    lock = lock_data_folder(data_dir(args.data), "calibrate")  # before any device is opened
    try:
        with stop_requests() as stop:  # Ctrl-C, a kill or a closed terminal: safe state, record aborted
            return _calibrate(args, spheres, say, stop)
    finally:
        lock.release()


def _calibrate(args: argparse.Namespace, spheres: list[Any], say: Any, stop: Any) -> int:
    from pycnoctl.controller.cli.common import check_before_opening, open_instrument
    from pycnoctl.controller.jobs.calibration import (
        CalibrationError,
        OperatorCellLoader,
        SimCellLoader,
        calibrate,
    )
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.record.catalog import Catalog
    from pycnoctl.controller.run.sequence import SequenceNotFound

    instrument = None
    if args.sim is not None and not args.instrument:
        from pycnoctl.controller.cli.common import sim_seed

        loader: Any = SimCellLoader(args.sim or None, announce=say, seed=sim_seed(args))
    else:
        check_before_opening(args, args.sequence, one_volume=False)  # it runs each volume in turn
        instrument = open_instrument(args)

        def prompt(text: str) -> None:
            with stop.prompting():  # nothing else would read a stop while input() waits
                answer = input(f"{text} (q to stop): ")
            if answer.strip().lower() in ("q", "quit"):
                raise KeyboardInterrupt

        loader = OperatorCellLoader(instrument, None if args.yes else prompt)
    root = data_dir(args.data)
    root.mkdir(parents=True, exist_ok=True)
    catalog = Catalog(root / "catalog.sqlite")
    try:
        outcome = calibrate(spheres, loader, catalog=catalog, root=root / "runs",
                            expansion_volumes=args.expansion_volume, sequence=args.sequence,
                            operator=args.operator, alpha=args.alpha, progress=say, should_stop=stop)
    except (CalibrationError, SequenceNotFound) as exc:
        raise UsageError(str(exc)) from None
    except ValueError as exc:  # unknown expansion volume and the like
        raise UsageError(str(exc)) from None
    finally:
        catalog.close()
        if instrument is not None:
            instrument.close()
    if args.json:
        print(json.dumps({"status": outcome.status, "message": outcome.message,
                          "volumes": [o.as_dict() for o in outcome.outcomes]}, indent=2, default=float))
    elif args.csv:
        from pycnoctl.controller.cli.display import write_csv

        write_csv([o.as_dict() for o in outcome.outcomes], CSV_COLUMNS, sys.stdout)
    else:
        print_outcome(outcome)
    return EXIT.get(outcome.status, 3)


def outcome_rows(outcome: Any) -> list[list[str]]:
    rows = []
    for o in outcome.outcomes:
        d = o.as_dict()
        verdict = "stored" if o.accepted else "REFUSED"
        if o.fit is None:
            rows.append([o.expansion_volume, "-", "-", "-", "-", "-", "-", "not fitted"])
            continue
        rows.append([o.expansion_volume, f"{d['vc_cm3']:.5f}", f"{d['u_vc_cm3']:.5f}", f"{d['vr_cm3']:.5f}",
                     f"{d['u_vr_cm3']:.5f}", f"{d['corr']:.4f}", f"{d['chi2']:.3g} / {d['dof']}", verdict])
    return rows


def print_outcome(outcome: Any) -> None:
    from pycnoctl.controller.cli.display import Column, console, print_table

    con = console()
    cols = [Column("volume"), Column("Vc / cm3", True), Column("u(Vc)", True), Column("Vr / cm3", True),
            Column("u(Vr)", True), Column("r(Vc,Vr)", True, 2), Column("chi2 / dof", True, 1), Column("result")]
    print_table(cols, outcome_rows(outcome), title="calibration", con=con)
    con.print("uncertainties are standard (k = 1), from the pressure noise and the sphere certificates")
    for o in outcome.outcomes:
        if o.accepted:
            con.print(f"{o.expansion_volume}: calibration {o.record_id} stored (runs {', '.join(o.run_ids)})",
                      markup=False)
        else:  # 'refused' is the residual test's word; a stopped or faulted calibration was never fitted
            word = "refused" if outcome.status == "refused" else "not calibrated"
            con.print(f"{o.expansion_volume}: {word}: {o.reason}", style="red", markup=False)
