"""pycnoctl compare RUN RUN...: stored results side by side, each against the first.

For every run after the first: the difference of the skeletal volumes, its expanded uncertainty
U(d) (k = 2) and the En number |d| / U(d) (ISO 13528; |En| <= 1: the two agree within their
uncertainties).  Runs computed with the same calibration share its errors, which cancel in a
difference: U(d) then leaves out the covariance the shared Vc and Vr give (GUM, JCGM 100:2008,
5.2.2), so two runs on one calibration are compared on what can differ between them.
--plot PATH overlays the runs' pressure traces (time from each run's start) in one PNG.

RUN is a run ID (looked up in the data folder) or a run folder.  u is standard (k = 1), U expanded (k = 2).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

from pycnoctl.controller.cli.common import add_data_arg, resolve_run_folder
from pycnoctl.controller.cli.display import add_output_args
from pycnoctl.controller.cli.main import UsageError

K = 2.0  # coverage factor of the expanded uncertainties compared
CSV_COLUMNS = ["run_id", "sample_id", "status", "calibration_id", "volume_cm3", "U_volume_cm3", "density_g_cm3",
               "U_density_g_cm3", "difference_cm3", "U_difference_cm3", "En", "shared_calibration", "record_disagrees"]


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("compare", help="stored results side by side: differences, their U and the En number",
                       description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("runs", nargs="+", metavar="RUN", help="two or more run IDs or run folders; the first is the "
                                                          "reference")
    add_data_arg(p)
    p.add_argument("--plot", metavar="PATH", help="write the overlaid pressure traces to this PNG")
    add_output_args(p, what="the comparison")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.record.runfolder import load_run

    if len(args.runs) < 2:
        raise UsageError("give at least two runs")
    root = data_dir(args.data)
    runs = []
    seen: dict[Any, str] = {}
    for ref in args.runs:
        folder = resolve_run_folder(root, ref)
        run = load_run(folder)
        if run.summary is None:
            raise UsageError(f"{folder}: no summary (still running, or interrupted)")
        # a run against itself gives d = 0 with U(d) = 0 (its errors all shared): no comparison at all
        for key in (folder.resolve(), run.summary.get("run_id")):
            if key is not None and key in seen:
                raise UsageError(f"{seen[key]!r} and {ref!r} are the same run ({run.summary.get('run_id') or folder}):"
                                 " a run is not compared with itself; give different runs")
            if key is not None:
                seen[key] = ref
        runs.append((folder, run))
    rows = compare([r.summary for _, r in runs])
    from pycnoctl.controller.record.integrity import disagreement_line, folder_disagreements

    # a result edited after its run is not compared as if it were one (found by a sweep: En 1.50 on an edit)
    for row, (folder, run) in zip(rows, runs, strict=True):
        line = disagreement_line(folder_disagreements(folder, run.summary or {}))
        row["record_disagrees"] = line
        if line is not None:
            print(f"{row.get('run_id') or folder.name}: {line}", file=sys.stderr)
    if args.plot:
        overlay([r for _, r in runs], Path(args.plot))
    if args.json:
        print(json.dumps(rows, indent=2))
    elif args.csv:
        from pycnoctl.controller.cli.display import write_csv

        write_csv(rows, CSV_COLUMNS, sys.stdout)
    else:
        print_comparison(rows)
        if args.plot:
            print(f"traces: {Path(args.plot).absolute()}")
    return 0


# ----------------------------------------------------------------------------------------- the maths
def _result(doc: dict[str, Any]) -> dict[str, Any]:
    return {**doc, **(doc.get("results") or {})}


def _cal_id(doc: dict[str, Any]) -> str | None:
    return (doc.get("calibration") or {}).get("record_id")


def shared_covariance(a: dict[str, Any], b: dict[str, Any]) -> float:
    """cov(Va, Vb) in m^6 from the calibration the two runs share (0 when they do not share one).

    Both results are Vs = Vc - Vr y with their own y, so cov = sum_ij ca_i cb_j cov(x_i, x_j) over
    x = (Vc, Vr) with each run's sensitivities from its own budget (GUM 5.2.2 for correlated inputs)."""
    if _cal_id(a) is None or _cal_id(a) != _cal_id(b):
        return 0.0

    def parts(doc: dict[str, Any]) -> tuple[float, float, float, float, float] | None:
        rows = {r.get("name"): r for r in doc.get("budget") or []}
        vc, vr = rows.get("cell volume Vc"), rows.get("expansion volume Vr")
        if vc is None or vr is None:
            return None
        cov = (rows.get("covariance Vc, Vr") or {}).get("value") or 0.0
        return (float(vc["sensitivity"]), float(vr["sensitivity"]), float(vc["std_u"]), float(vr["std_u"]),
                float(cov))

    pa, pb = parts(_result(a)), parts(_result(b))
    if pa is None or pb is None:
        return 0.0
    cvc_a, cvr_a, u_vc, u_vr, cov = pa
    cvc_b, cvr_b = pb[0], pb[1]
    return cvc_a * cvc_b * u_vc ** 2 + cvr_a * cvr_b * u_vr ** 2 + (cvc_a * cvr_b + cvr_a * cvc_b) * cov


def compare(docs: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """One row per run; differences, U(d) and En against the first run (volumes in cm3)."""
    ref = _result(docs[0])
    rows = []
    for i, doc in enumerate(docs):
        r = _result(doc)
        row: dict[str, Any] = {
            "run_id": r.get("run_id"), "sample_id": r.get("sample_id") or "", "status": r.get("status"),
            "calibration_id": _cal_id(doc), "volume_cm3": r.get("volume_cm3"), "U_volume_cm3": r.get("volume_u_cm3"),
            "density_g_cm3": r.get("density_g_cm3"), "U_density_g_cm3": r.get("density_u_g_cm3"),
            "difference_cm3": None, "U_difference_cm3": None, "En": None, "shared_calibration": None}
        both = [x.get("volume_cm3") is not None and x.get("volume_u_std_cm3") is not None for x in (ref, r)]
        if i > 0 and all(both):
            d = r["volume_cm3"] - ref["volume_cm3"]
            cov = shared_covariance(docs[0], doc) * 1e12  # m^6 -> cm^6
            var = r["volume_u_std_cm3"] ** 2 + ref["volume_u_std_cm3"] ** 2 - 2.0 * cov
            u_d = math.sqrt(max(var, 0.0))
            row.update({"difference_cm3": d, "U_difference_cm3": K * u_d,
                        "En": abs(d) / (K * u_d) if u_d > 0 else None, "shared_calibration": cov != 0.0})
        rows.append(row)
    return rows


# ----------------------------------------------------------------------------------------- people
def print_comparison(rows: list[dict[str, Any]]) -> None:
    from pycnoctl.controller.cli.display import NAME_FOLD, Column, console, print_table

    def f(x: Any, fmt: str) -> str:
        return "-" if x is None else format(x, fmt)

    con = console()
    cols = [Column("run"), Column("sample", priority=2, fold=NAME_FOLD), Column("volume / cm3", True),
            Column("U / cm3", True), Column("density g/cm3", True, 3), Column("d / cm3", True),
            Column("U(d) / cm3", True), Column("En", True), Column("calibration", priority=4)]
    table = [[r["run_id"] or "-", r["sample_id"] or "-", f(r["volume_cm3"], ".5f"), f(r["U_volume_cm3"], ".5f"),
              f(r["density_g_cm3"], ".5f"), "(reference)" if i == 0 else f(r["difference_cm3"], "+.5f"),
              f(r["U_difference_cm3"], ".5f"), f(r["En"], ".2f"),
              r["calibration_id"] or "uncalibrated"] for i, r in enumerate(rows)]
    print_table(cols, table, title="comparison with the first run", con=con)
    con.print("U: expanded uncertainty (k = 2); d: difference from the first run; En = |d| / U(d): "
              "at most 1 means the two agree", markup=False)
    if any(r["shared_calibration"] for r in rows[1:]):
        con.print("runs on the first run's calibration: its shared Vc, Vr errors cancel in d and are left out "
                  "of U(d)", markup=False)
    for r in rows[1:]:
        if r["En"] is not None and r["En"] > 1.0:
            con.print(f"{r['run_id']}: differs from {rows[0]['run_id']} by more than the uncertainties allow "
                      f"(En {r['En']:.2f})", style="yellow", markup=False)


def overlay(runs: list[Any], png: Path) -> Path:
    """The runs' gauge-pressure traces on one time axis (each from its own start), decimated per pixel."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from pycnoctl.controller.record.decimate import decimate_minmax
    from pycnoctl.controller.record.report import gauge_trace

    fig, ax = plt.subplots(figsize=(9, 4.2), dpi=110)
    for run in runs:
        t, p = gauge_trace(run)
        if len(t) == 0:
            continue
        keep = decimate_minmax(t, p, 1600)  # the record is never thinned; only what is drawn
        td, pd = t[keep], p[keep]
        label = f"{(run.summary or {}).get('run_id', '')} {((run.summary or {}).get('sample_id') or '')}".strip()
        ax.plot(td, pd / 1e5, lw=0.8, label=label)
    ax.set_xlabel("time from the run's start / s")
    ax.set_ylabel("pressure / bar (gauge)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    png.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(png)
    plt.close(fig)
    return png
