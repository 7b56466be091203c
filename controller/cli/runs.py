"""``pycnoctl runs``: list the catalog's runs, filtered; as a table, JSON or CSV.

--sample takes an exact ID, or a prefix ending in '*' (e.g. 'AL-04*'; only a final '*' is special, and
case counts).  --since/--until take a date
(2025-03-14, UTC midnight) or an ISO time; --until is exclusive.  Volumes in cm^3 (expanded
uncertainty), densities in g/cm^3, masses in g.  --before RUN_ID gives the page after that run (the
last one listed), so a long listing is read a page at a time.
"""

from __future__ import annotations

import argparse
import csv
import datetime as _dt
import json
import sys
from typing import Any

from pycnoctl.controller.cli.common import add_data_arg
from pycnoctl.controller.cli.main import UsageError

CSV_COLUMNS = ["run_id", "created", "sample_id", "sequence", "kind", "status", "started", "ended", "volume_cm3",
               "U_volume_cm3", "density_g_cm3", "mass_g", "calibration_id", "message"]


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("runs", help="list runs in the catalog", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    add_data_arg(p)
    p.add_argument("--sample", metavar="ID", help="sample ID, or a prefix ending in '*'")
    p.add_argument("--since", metavar="TIME", help="created at or after (date or ISO time, UTC)")
    p.add_argument("--until", metavar="TIME", help="created before (date or ISO time, UTC)")
    p.add_argument("--status", action="append", metavar="STATUS",
                   help="completed, fault, aborted, interrupted, running or queued (repeatable)")
    p.add_argument("--limit", type=int, default=50, help="at most this many, newest first (default 50)")
    p.add_argument("--before", metavar="RUN_ID", help="only runs listed after this one (the next page)")
    out = p.add_mutually_exclusive_group()
    out.add_argument("--json", action="store_true", help="JSON list")
    out.add_argument("--csv", action="store_true", help="CSV export (all matching runs up to --limit)")
    p.set_defaults(func=main)


def parse_time(text: str, flag: str) -> _dt.datetime:
    try:
        t = _dt.datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError:
        raise UsageError(f"{flag}: {text!r} is not a date (2025-03-14) or ISO time") from None
    return t if t.tzinfo is not None else t.replace(tzinfo=_dt.UTC)


def row_dict(r: Any) -> dict[str, Any]:
    """A catalog row in report units."""
    return {"run_id": r.id, "created": r.created, "sample_id": r.sample_id, "sequence": r.sequence_name,
            "kind": r.kind, "status": r.status, "started": r.started, "ended": r.ended,
            "volume_cm3": None if r.volume_m3 is None else r.volume_m3 * 1e6,
            "U_volume_cm3": None if r.u_volume_m3 is None else r.u_volume_m3 * 1e6,
            "density_g_cm3": None if r.density is None else r.density / 1e3,
            "mass_g": None if r.mass is None else r.mass * 1e3, "calibration_id": r.calibration_id,
            "message": r.message}


def query(catalog: Any, *, sample: str | None = None, since: _dt.datetime | None = None,
          until: _dt.datetime | None = None, status: list[str] | None = None, limit: int = 50,
          before: str | None = None) -> list[Any]:
    """Runs newest first; a sample ending in '*' matches by prefix (an index range in the catalog)."""
    from pycnoctl.controller.record.catalog import CatalogError

    prefix = sample[:-1] if sample and sample.endswith("*") else None
    try:
        return catalog.list_runs(sample=None if prefix is not None else sample, sample_prefix=prefix,
                                 status=status, since=since, until=until, limit=limit, before=before)
    except CatalogError as exc:
        raise UsageError(str(exc)) from None


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.record.catalog import Catalog

    if args.limit < 1:
        raise UsageError("--limit must be at least 1")
    root = data_dir(args.data)
    path = root / "catalog.sqlite"
    if not path.exists():
        raise UsageError(f"no catalog at {path} (set --data or PYCNOCTL_DATA)")
    since = parse_time(args.since, "--since") if args.since else None
    until = parse_time(args.until, "--until") if args.until else None
    with Catalog.for_reading(path) as catalog:
        rows = [row_dict(r) for r in query(catalog, sample=args.sample, since=since, until=until,
                                             status=args.status, limit=args.limit, before=args.before)]
    if args.json:
        print(json.dumps(rows, indent=2))
    elif args.csv:
        w = csv.DictWriter(sys.stdout, fieldnames=CSV_COLUMNS, lineterminator="\n")
        w.writeheader()
        for r in rows:
            w.writerow({k: ("" if v is None else (repr(v) if isinstance(v, float) else v)) for k, v in r.items()})
    else:
        print_table(rows)
    return 0


def print_table(rows: list[dict[str, Any]]) -> None:
    from rich.console import Console
    from rich.table import Table

    table = Table()
    for col in ("run", "created (UTC)", "sample", "sequence", "status", "volume / cm3", "U", "density"):
        table.add_column(col, justify="left" if col in ("run", "sample", "sequence", "status") else "right")
    for r in rows:
        table.add_row(r["run_id"], (r["created"] or "")[:19].replace("T", " "), r["sample_id"] or "",
                      r["sequence"] or "", r["status"], _f(r["volume_cm3"]), _f(r["U_volume_cm3"]),
                      _f(r["density_g_cm3"]))
    Console().print(table)
    print(f"{len(rows)} run(s)")


def _f(x: float | None) -> str:
    return "-" if x is None else f"{x:.5f}"
