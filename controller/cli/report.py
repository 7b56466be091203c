"""pycnoctl report: the report of one run, or a summary across a sample set, as HTML or PDF.

pycnoctl report RUN [--out FILE] [--pdf]                 one run (figure saved beside it as PNG)
pycnoctl report --samples PREFIX [--out FILE] [--pdf]    completed runs of samples whose ID starts with PREFIX
pycnoctl report --runs ID [ID ...] [--out FILE] [--pdf]  the listed runs, grouped by sample

A FILE ending in .pdf, or --pdf, writes PDF: the result with its expanded U, the warnings, the
calibration and links on the first page, then the trace, the cycles and the budget.  The sample-set
summary plots each run's density with its expanded U, by sample.
"""

from __future__ import annotations

import argparse
from collections.abc import Iterator
from contextlib import contextmanager
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
    p.add_argument("--out", metavar="FILE", help="where to write the report (.html, or .pdf for PDF)")
    p.add_argument("--pdf", action="store_true", help="write PDF (default name report.pdf / sample-set.pdf)")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.record.report import render_report, render_sample_set, sample_set

    root = data_dir(args.data)
    if args.samples is None and args.runs is None:
        if not args.run:
            raise UsageError("name a run, or give --samples PREFIX or --runs ID ...")
        folder = resolve_run_folder(root, args.run)
        out = Path(args.out) if args.out else (folder / "report.pdf" if args.pdf else None)
        if args.pdf and out is not None and out.suffix.lower() != ".pdf":
            raise UsageError("--pdf: give an --out FILE ending in .pdf, or none")
        with elsewhere_hint(not args.out):  # the default place, beside the run (HTML or PDF)
            print(render_report(folder, out).absolute())
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
    out = Path(args.out) if args.out else root / "reports" / ("sample-set.pdf" if args.pdf else "sample-set.html")
    if args.pdf and out.suffix.lower() != ".pdf":
        raise UsageError("--pdf: give an --out FILE ending in .pdf, or none")
    with elsewhere_hint(not args.out):
        print(render_sample_set(stats, out, title=title).absolute())
    return 0


@contextmanager
def elsewhere_hint(default_place: bool, option: str = "--out FILE") -> Iterator[None]:
    """A report that cannot be written where it goes by default (a data folder on read-only media, an
    archive copy without write permission) says how to write it elsewhere: the records are still read.
    One asked for elsewhere (``--out``) that cannot be written there says why, in one line."""
    try:
        yield
    except OSError as exc:
        from pycnoctl.controller.record.storagefault import StorageFault, storage_cause

        where = f" {exc.filename}" if exc.filename else ""
        cause = storage_cause(exc)
        hint = f"give {option} to write it elsewhere" if default_place else "choose another place"
        text = f"cannot write the report{where} ({cause or exc.strerror or exc}): {hint}"
        if cause is not None:  # a condition of the machine: exit 6, as every storage fault
            raise StorageFault(text) from exc
        raise UsageError(text) from exc
