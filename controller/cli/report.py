"""pycnoctl report: the HTML report of one run, or a summary across a sample set.

pycnoctl report RUN [--out FILE]                 one run (figure saved beside the HTML as PNG)
pycnoctl report --samples PREFIX [--out FILE]    completed runs of samples whose ID starts with PREFIX
pycnoctl report --runs ID [ID ...] [--out FILE]  the listed runs, grouped by sample
"""

from __future__ import annotations

import argparse
from pathlib import Path

from pycnoctl.controller.cli.common import add_data_arg, resolve_run_folder
from pycnoctl.controller.cli.main import UsageError


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("report", help="write an HTML report of a run or a sample set", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("run", nargs="?", help="run ID or run folder")
    add_data_arg(p)
    g = p.add_mutually_exclusive_group()
    g.add_argument("--samples", metavar="PREFIX", help="sample-set summary of samples with this ID prefix")
    g.add_argument("--runs", nargs="+", metavar="ID", help="sample-set summary of these runs")
    p.add_argument("--out", metavar="FILE", help="where to write the HTML")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.record.report import render_report, render_sample_set, sample_set

    root = data_dir(args.data)
    if args.samples is None and args.runs is None:
        if not args.run:
            raise UsageError("name a run, or give --samples PREFIX or --runs ID ...")
        print(render_report(resolve_run_folder(root, args.run), Path(args.out) if args.out else None))
        return 0
    if args.run:
        raise UsageError("give a run or a sample set, not both")
    from pycnoctl.controller.record.catalog import Catalog

    path = root / "catalog.sqlite"
    if not path.exists():
        raise UsageError(f"no catalog at {path} (set --data or PYCNOCTL_DATA)")
    with Catalog.for_reading(path) as catalog:
        stats = sample_set(catalog, prefix=args.samples, run_ids=args.runs)
    title = f"sample set {args.samples}*" if args.samples is not None else "sample set (listed runs)"
    out = Path(args.out) if args.out else root / "reports" / "sample-set.html"
    print(render_sample_set(stats, out, title=title))
    return 0
