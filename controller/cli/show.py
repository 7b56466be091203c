"""pycnoctl show RUN: one stored run - summary, cycles and uncertainty budget - read from its record.

RUN is a run ID (looked up under the data folder) or the path of a run folder.  Pressures are gauge
(above ambient); u is a standard uncertainty (k = 1), U an expanded one (k = 2).  --csv prints the
cycles, --json the whole stored summary.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

from pycnoctl.controller.cli.common import add_data_arg, resolve_run_folder
from pycnoctl.controller.cli.display import add_output_args, add_units_arg, parse_units
from pycnoctl.controller.cli.main import UsageError


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("show", help="show one stored run", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("run", help="run ID or run folder")
    add_data_arg(p)
    add_units_arg(p)
    add_output_args(p, what="the stored summary (--csv: its cycles)")
    p.add_argument("--report", nargs="?", const="", metavar="PATH",
                   help="write the HTML report (default: report.html in the run folder) and print its path")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.record.runfolder import load_run

    units = parse_units(args.units)
    folder = resolve_run_folder(data_dir(args.data), args.run)
    run = load_run(folder)
    if args.report is not None:
        from pycnoctl.controller.cli.report import elsewhere_hint
        from pycnoctl.controller.record.report import render_report

        with elsewhere_hint(not args.report, option="--report PATH"):
            print(render_report(folder, Path(args.report) if args.report else None))
        return 0
    if run.summary is None:
        raise UsageError(f"{folder}: the run has no summary yet (still running, or interrupted)")
    if args.json:
        print(json.dumps(run.summary, indent=2))
    elif args.csv:
        import sys

        from pycnoctl.controller.cli.display import write_csv
        from pycnoctl.controller.cli.result_view import cycle_csv_columns, cycle_records

        write_csv(cycle_records(_result(run.summary), units), cycle_csv_columns(units), sys.stdout)
    else:
        from pycnoctl.controller.record.integrity import disagreement_line, folder_disagreements

        problem = disagreement_line(folder_disagreements(folder, run.summary))
        if problem is not None:
            print(problem)
        print_run(run.summary, folder, units, retired=_retired_since(folder, run.summary))
    return 0


def _retired_since(folder: Path, doc: dict[str, Any]) -> str | None:
    """When and why the calibration this run computed with was taken out of use since, if it was.

    Why: `calibrations retire` changes only the catalog (one transaction, no lock, so it works while the
    daemon serves); a run keeps the calibration it started with, and its record must not read as if that
    calibration were still trusted."""
    from pycnoctl.controller.record.runfolder import catalog_beside

    rec = (doc.get("calibration") or {}).get("record") or {}
    catalog_path = catalog_beside(folder)
    if not rec.get("id") or catalog_path is None:
        return None
    from pycnoctl.controller.record.catalog import Catalog

    with Catalog.for_reading(catalog_path) as catalog:
        now = catalog.get_calibration(rec["id"])
    return now.retired if now is not None else None


def _result(doc: dict[str, Any]) -> dict[str, Any]:
    """The results block with the record-level parts the views read (sequence, calibration, instrument)."""
    res = dict(doc.get("results") or {})
    for key in ("sequence", "run_id", "calibration", "instrument", "simulated"):
        if key in doc:
            res.setdefault(key, doc.get(key))
    return res


def print_run(doc: dict[str, Any], folder: Path, units: Any = None, *, retired: str | None = None) -> None:
    from pycnoctl.controller.cli.display import Column, Units, console, print_table
    from pycnoctl.controller.cli.result_view import print_summary
    from pycnoctl.controller.record.report import budget_rows

    units = units or Units()
    res = _result(doc)
    con = console()
    con.print(f"run {doc.get('run_id')}  sample {res.get('sample_id') or '-'}  started {res.get('started_utc')}  "
              f"operator {res.get('operator') or '-'}", markup=False)
    print_summary(res, folder, units, con=con)
    budget = res.get("budget") or []
    if budget:
        cols = [Column("input", wrap=True), Column("value", True, 2), Column("u", True, 1),
                Column("sensitivity", True, 3), Column("contribution / cm3", True), Column("share", True)]
        print_table(cols, budget_rows(budget), title="uncertainty budget (standard uncertainties, k = 1)", con=con)
    rec = (doc.get("calibration") or {}).get("record")
    if rec:
        con.print(f"calibration {rec['id']} of {rec['created'][:10]} ({rec['gas']}): Vc {rec['vc_m3'] * 1e6:.5f} "
                  f"+/- {rec['u_vc_m3'] * 1e6:.5f} cm3, Vr {rec['vr_m3'] * 1e6:.5f} +/- {rec['u_vr_m3'] * 1e6:.5f} cm3 "
                  "(standard u)", markup=False)
        if retired:
            con.print(f"RETIRED since this run: calibration {rec['id']} ({retired}); the result rests on it: "
                      f"`pycnoctl analyze {doc.get('run_id')} --calibration ID` recomputes it with another",
                      style="bold red", markup=False)
    else:
        from pycnoctl.controller.cli.result_view import nominal_words

        con.print("calibration: NONE - " + nominal_words(doc.get("calibration") or {}), markup=False)
