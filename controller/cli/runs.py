"""pycnoctl runs: list the catalog's runs, filtered; as a table, JSON or CSV.

--sample takes an exact ID, or a prefix ending in '*' (e.g. 'AL-04*'; only a final '*' is special, and
case counts).  --since/--until take a date
(2025-03-14, UTC midnight) or an ISO time; --until is exclusive.  Volumes in cm^3 (expanded
uncertainty U, k = 2), densities in g/cm^3 (or as --units says), masses in g.  --before RUN_ID gives
the page after that run (the last one listed), so a long listing is read a page at a time.

The table never cuts a run ID or a figure: on a narrow terminal it leaves out the less important
columns (and says which).  --csv and --json carry every column, including what each run's record
adds: gas, instrument, operator, expansion volume, RSD, cycles kept, convergence, porosity, whether
it was simulated, the calibration and the warnings.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as _dt
import json
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from pycnoctl.controller.cli.common import add_data_arg
from pycnoctl.controller.cli.display import add_output_args, add_units_arg, parse_units
from pycnoctl.controller.cli.main import UsageError

CSV_COLUMNS = ["run_id", "created", "sample_id", "sequence", "kind", "status", "started", "ended", "volume_cm3",
               "U_volume_cm3", "density_g_cm3", "mass_g", "calibration_id", "message",
               # from the run's record (summary.json) unless the catalog row has the field itself
               "gas", "instrument", "operator", "expansion_volume", "rsd", "cycles", "cycles_kept", "converged",
               "porosity", "U_porosity", "simulated", "calibrated", "warnings", "record_missing",
               "process_gone"]


def _flat(doc: dict[str, Any]) -> dict[str, Any]:
    return {**doc, **(doc.get("results") or {})}


# column -> its value from a run's stored summary; a column the catalog row carries (an attribute of
# the same name) is taken from the row instead, so a new catalog field is one line in CSV_COLUMNS
FROM_RECORD: dict[str, Callable[[dict[str, Any]], Any]] = {
    "gas": lambda d: d.get("gas"),
    "instrument": lambda d: (d.get("instrument") or {}).get("name"),
    "operator": lambda d: d.get("operator") or None,
    "expansion_volume": lambda d: d.get("expansion_volume"),
    "rsd": lambda d: d.get("rsd"),
    "cycles": lambda d: len(d.get("cycles") or []) or None,
    "cycles_kept": lambda d: d.get("n_kept"),
    "converged": lambda d: d.get("converged"),
    "porosity": lambda d: d.get("porosity"),
    "U_porosity": lambda d: d.get("porosity_u"),
    "simulated": lambda d: _simulated(d),
    "calibrated": lambda d: d.get("calibrated"),
    "warnings": lambda d: list(d.get("warnings") or []),
}


def _simulated(d: dict[str, Any]) -> bool | None:
    from pycnoctl.controller.cli.result_view import is_simulated

    return is_simulated(d)


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("runs", help="list runs in the catalog", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    add_data_arg(p)
    p.add_argument("--sample", metavar="ID", help="sample ID, or a prefix ending in '*'")
    p.add_argument("--since", metavar="TIME", help="created at or after (date or ISO time, UTC)")
    p.add_argument("--until", metavar="TIME", help="created before (date or ISO time, UTC)")
    p.add_argument("--status", action="append", metavar="STATUS",
                   help="completed, fault, aborted, interrupted, cancelled, running or queued (repeatable)")
    p.add_argument("--limit", type=int, default=50, help="at most this many, newest first (default 50)")
    p.add_argument("--before", metavar="RUN_ID", help="only runs listed after this one (the next page)")
    add_units_arg(p)
    add_output_args(p, what="every column of the matching runs (up to --limit)")
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


def with_record(row: dict[str, Any], r: Any, runs_dir: Path) -> dict[str, Any]:
    """The row with the columns its run's record adds (empty when the record has no summary)."""
    doc: dict[str, Any] = {}
    folder = runs_dir / (r.folder or r.id)
    with contextlib.suppress(OSError, ValueError):  # no summary (interrupted, queued): the row's own fields
        doc = _flat(json.loads((folder / "summary.json").read_text(encoding="utf-8")))
    out = dict(row)
    for col, get in FROM_RECORD.items():
        out[col] = getattr(r, col) if hasattr(r, col) else get(doc)
    # a run that started keeps a folder; without it the catalog's figures stand alone, unverifiable (found by
    # a sweep: a deleted run folder still listed as completed, its volume shown)
    out["record_missing"] = r.started is not None and not folder.is_dir()
    return out


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
    units = parse_units(args.units)
    with Catalog.for_reading(path) as catalog:
        found = query(catalog, sample=args.sample, since=since, until=until, status=args.status,
                      limit=args.limit, before=args.before)
        unlisted = set() if args.json or args.csv else _unlisted_folders(root / "runs", catalog)
    rows = [with_record(row_dict(r), r, root / "runs") for r in found]
    if any(r["status"] == "running" for r in rows):
        from pycnoctl.controller.record.datalock import live_writer

        gone = live_writer(root) is None  # killed: the next writer marks it interrupted (found by a sweep)
        for r in rows:
            if r["status"] == "running":
                r["process_gone"] = gone
    if args.json:
        print(json.dumps(rows, indent=2))
    elif args.csv:
        from pycnoctl.controller.cli.display import write_csv

        write_csv(rows, CSV_COLUMNS, sys.stdout)
    else:
        print_table(rows, units)
        if unlisted:
            print(f"(the runs folder holds {len(unlisted)} run folder{'s' if len(unlisted) != 1 else ''} the catalog "
                  f"does not list, e.g. {sorted(unlisted)[0]}: a catalog replaced or restored from before them? "
                  "pycnoctl show and analyze read a run folder directly)")
    return 0


def _unlisted_folders(runs_dir: Path, catalog: Any) -> set[str]:
    """Run folders under runs/ that no catalog row names."""
    from pycnoctl.controller.record.catalog import is_run_id

    try:
        names = {e.name for e in os.scandir(runs_dir) if e.is_dir() and is_run_id(e.name)}
    except OSError:
        return set()
    return names - catalog.folder_names() if names else set()


def table_columns(units: Any) -> list[Any]:
    from pycnoctl.controller.cli.display import NAME_FOLD, Column

    return [Column("run"), Column("created (UTC)", priority=4), Column("sample", fold=NAME_FOLD),
            Column("sequence", priority=3, fold=NAME_FOLD),
            Column("status"), Column("volume / cm3", True), Column("U / cm3 (k=2)", True, 1),
            Column(f"density / {units.density}", True, 2), Column("notes", priority=5, wrap=True)]


def notes(r: dict[str, Any]) -> str:
    """What a result needs said beside it: not a measurement, simulated, uncalibrated, not converged,
    warnings."""
    out = []
    if _impossible(r):
        out.append("NOT A MEASUREMENT")
    if r.get("simulated"):
        out.append("simulated")
    if r.get("calibrated") is False and r.get("volume_cm3") is not None:
        out.append("uncalibrated")
    if r.get("converged") is False:
        out.append("NOT converged")
    n = len(r.get("warnings") or [])
    if n:
        out.append(f"{n} warning{'s' if n > 1 else ''}")
    return ", ".join(out) or "-"


def _impossible(r: dict[str, Any]) -> bool:
    """A result no specimen can have (the run exited 7): its catalog row's message says so."""
    from pycnoctl.controller.maths.results import is_not_a_measurement

    return is_not_a_measurement(r.get("message"))


def table_rows(rows: list[dict[str, Any]], units: Any) -> list[list[str]]:
    # the volume cell itself carries an impossible result's mark: the notes column is the first a
    # narrow terminal leaves out
    return [[r["run_id"], (r["created"] or "")[:16].replace("T", " "), r["sample_id"] or "-",
             r["sequence"] or "-", r["status"] + (" (NO RECORD)" if r.get("record_missing") else "")
             + (" (no process: killed?)" if r.get("process_gone") else ""),
             _f(r["volume_cm3"]) + (" (not a measurement)" if _impossible(r) else ""), _f(r["U_volume_cm3"]),
             units.rho(None if r["density_g_cm3"] is None else r["density_g_cm3"] * 1e3), notes(r)] for r in rows]


def print_table(rows: list[dict[str, Any]], units: Any = None) -> None:
    from pycnoctl.controller.cli.display import Units, console
    from pycnoctl.controller.cli.display import print_table as show

    units = units or Units()
    show(table_columns(units), table_rows(rows, units), con=console())
    print(f"{len(rows)} run(s)")


def _f(x: float | None) -> str:
    return "-" if x is None else f"{x:.5f}"
