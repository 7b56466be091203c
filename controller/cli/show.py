"""``pycnoctl show RUN``: one stored run - summary, cycles and uncertainty budget - read from its record.

RUN is a run ID (looked up under the data folder) or the path of a run folder.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

from pycnoctl.controller.cli.common import add_data_arg, resolve_run_folder
from pycnoctl.controller.cli.main import UsageError


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("show", help="show one stored run", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("run", help="run ID or run folder")
    add_data_arg(p)
    p.add_argument("--json", action="store_true", help="print the stored summary.json")
    p.add_argument("--report", nargs="?", const="", metavar="PATH",
                   help="write the HTML report (default: report.html in the run folder) and print its path")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.record.runfolder import load_run

    folder = resolve_run_folder(data_dir(args.data), args.run)
    run = load_run(folder)
    if args.report is not None:
        from pycnoctl.controller.record.report import render_report

        print(render_report(folder, Path(args.report) if args.report else None))
        return 0
    if run.summary is None:
        raise UsageError(f"{folder}: the run has no summary yet (still running, or interrupted)")
    if args.json:
        print(json.dumps(run.summary, indent=2))
    else:
        print_run(run.summary, folder)
    return 0


def print_run(doc: dict[str, Any], folder: Path) -> None:
    from rich.console import Console
    from rich.table import Table

    from pycnoctl.controller.cli.run import print_summary
    from pycnoctl.controller.record.report import budget_rows

    res = dict(doc.get("results") or {})
    res.setdefault("sequence", doc.get("sequence") or {})
    res.setdefault("run_id", doc.get("run_id"))
    con = Console()
    con.print(f"run {doc.get('run_id')}  sample {res.get('sample_id') or '-'}  started {res.get('started_utc')}  "
              f"operator {res.get('operator') or '-'}")
    print_summary(res, folder)
    budget = res.get("budget") or []
    if budget:
        table = Table(title="uncertainty budget (standard)")
        for col in ("input", "value", "u", "sensitivity", "contribution / cm3", "share"):
            table.add_column(col, justify="left" if col == "input" else "right")
        for row in budget_rows(budget):
            table.add_row(*row)
        con.print(table)
    rec = (doc.get("calibration") or {}).get("record")
    if rec:
        con.print(f"calibration {rec['id']} of {rec['created'][:10]} ({rec['gas']}): Vc {rec['vc_m3'] * 1e6:.5f} "
                  f"+/- {rec['u_vc_m3'] * 1e6:.5f} cm3, Vr {rec['vr_m3'] * 1e6:.5f} +/- {rec['u_vr_m3'] * 1e6:.5f} cm3")
    else:
        con.print("calibration: nominal volumes of the instrument config")
