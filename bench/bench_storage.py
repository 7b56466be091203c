"""Every write of a quick-demo run failing in turn: the N-th-write fault injection over every N.

Usage: python bench/bench_storage.py [--short] [--mode disk-full|single-eio|both] [--json PATH]

One clean run on the simulator is counted first (trace rows, event lines, fsyncs, renames, catalog
commits, the data-folder lock); then for every N from 1 to that count the same run is made with
the N-th write failing: as a disk that stays full (ENOSPC from N on) and as a single I/O error (EIO
at N only).  Each outcome is checked as tests/test_storage_faults.py checks it (storage_harness.
problems): the simulator's true valves safe, no traceback, one line and exit 3 or 6, every catalog
row closed (by the run, or by the next writer when the catalog itself could not be written),
everything the recorder acknowledged readable.  ``--short`` runs the suite's stratified subset
(every start-up, event and bookkeeping write, every 100th trace row), for CI.
"""

from __future__ import annotations

import argparse
import errno
import json
import logging
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from storage_harness import problems, run_once, strata

from pycnoctl.sim.storage import IoPlan

MODES = {"disk-full": (errno.ENOSPC, True), "single-eio": (errno.EIO, False)}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--short", action="store_true", help="the stratified subset the test suite runs")
    ap.add_argument("--mode", choices=[*MODES, "both"], default="both")
    ap.add_argument("--json", metavar="PATH", help="write the figures as JSON")
    args = ap.parse_args()
    logging.disable(logging.CRITICAL)  # every injected fault logs its trip; the figures are below
    work = Path(tempfile.mkdtemp(prefix="bench-storage-"))
    clean = run_once(work / "clean", IoPlan(None))
    total = clean.plan.count
    st = strata(clean.plan.kinds)
    if clean.rc != 0 or problems(clean, total):
        print("the clean run failed", clean.err, file=sys.stderr)
        return 1
    if args.short:
        ns = st["start-up"] + st["event"] + st["bookkeeping"] + st["trace"][::100] + st["trace"][-1:]
    else:
        ns = list(range(1, total + 1))
    stratum = {n: name for name, members in st.items() for n in members}
    figures: dict[str, dict] = {"writes_per_run": total, "strata": {k: len(v) for k, v in st.items()}}
    failed_any = False
    for mode in (MODES if args.mode == "both" else [args.mode]):
        err, persistent = MODES[mode]
        t0 = time.perf_counter()
        by: dict[str, list[int]] = {name: [0, 0] for name in st}  # stratum -> [runs, bad]
        exits: dict[int, int] = {}
        bad: dict[int, list[str]] = {}
        for i, n in enumerate(ns):
            root = work / f"{mode}-{n}"
            o = run_once(root, IoPlan(n, err=err, persistent=persistent))
            p = problems(o, total)
            by[stratum[n]][0] += 1
            exits[o.rc] = exits.get(o.rc, 0) + 1
            if p:
                by[stratum[n]][1] += 1
                bad[n] = [o.plan.fired or "?", *p]
            if (i + 1) % 200 == 0:
                print(f"  {mode}: {i + 1}/{len(ns)}", file=sys.stderr, flush=True)
        took = time.perf_counter() - t0
        figures[mode] = {"runs": len(ns), "bad": len(bad), "seconds": round(took, 1), "exit_codes": exits,
                         "by_stratum": {k: {"runs": v[0], "bad": v[1]} for k, v in by.items()},
                         "first_bad": dict(list(bad.items())[:5])}
        failed_any = failed_any or bool(bad)
        print(f"{mode}: {len(ns)} of {total} writes failed in turn, {len(ns) - len(bad)} ended safe, closed and "
              f"readable, {len(bad)} did not; exit codes {exits}; {took:.1f} s "
              f"({took / len(ns) * 1e3:.0f} ms a run)")
        for name, (runs, nbad) in by.items():
            print(f"  {name:12s} {runs:5d} runs, {nbad} bad")
        for n, why in list(bad.items())[:5]:
            print(f"  N={n}: {why}")
    if args.json:
        Path(args.json).write_text(json.dumps(figures, indent=1))
    return 1 if failed_any else 0


if __name__ == "__main__":
    sys.exit(main())
