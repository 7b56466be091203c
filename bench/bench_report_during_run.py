"""A report of a long trace requested while a run goes on: does the control loop stall?

A 577,000-row trace (a 16-hour leak hold at 10 Hz) is written by the run recorder.  Then a simulated
run (purge-only, real time sped up --speed times) goes twice: once idle, once while the report worker
renders that trace's report in its own process.  Printed: the worst and the p99 gap between ticks in
wall time for both, their ratio (target: worst loaded gap under 2x the idle one), and whether the run
completed.  The daemon's API hands report requests to the same worker (controller/record/worker.py).

    python bench/bench_report_during_run.py [--rows N] [--speed S]
"""

from __future__ import annotations

import argparse
import logging
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.worker import ReportWorker
from pycnoctl.controller.run.control import Controller
from pycnoctl.drivers.simulated import build_sim_instrument

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from test_report_worker import long_run


def timed_run(root: Path, speed: float, worker: ReportWorker | None, folder: Path | None) -> tuple[np.ndarray, str,
                                                                                                    float | None]:
    inst = build_sim_instrument(None, realtime=True, speed=speed)
    ctl = Controller(inst)
    stamps: list[float] = []
    plain = ctl.tick

    def tick():  # type: ignore[no-untyped-def]
        s = plain()
        stamps.append(time.perf_counter())
        return s

    ctl.tick = tick  # type: ignore[method-assign]
    root.mkdir(parents=True, exist_ok=True)
    cat = Catalog(root / "catalog.sqlite")
    fut = worker.submit(folder) if worker is not None and folder is not None else None
    t0 = time.perf_counter()
    done_at: list[float] = []
    if fut is not None:
        fut.add_done_callback(lambda _f: done_at.append(time.perf_counter()))
    summary = execute(prepare(RunRequest("purge-only"), inst), ctl, root=root / "runs", catalog=cat)
    took = None
    if fut is not None:
        fut.result(timeout=900)
        time.sleep(0.05)  # the callback runs in the worker's result thread
        took = (done_at[0] if done_at else time.perf_counter()) - t0
    cat.close()
    return np.diff(np.array(stamps)), summary["status"], took


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--rows", type=int, default=577_000)
    ap.add_argument("--speed", type=float, default=4.0, help="simulated seconds per wall second")
    args = ap.parse_args()
    logging.disable(logging.WARNING)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        t = time.perf_counter()
        folder = long_run(root / "old", "R-LONG", args.rows)
        print(f"== report of a {args.rows:,}-row trace during a simulated run (purge-only, {args.speed:g}x real time)")
        size = (folder / "trace.csv").stat().st_size / 1e6
        print(f"   trace written in {time.perf_counter() - t:.1f} s ({size:.0f} MB)")
        idle, status_idle, _ = timed_run(root / "idle", args.speed, None, None)
        with ReportWorker() as worker:
            loaded, status_loaded, took = timed_run(root / "loaded", args.speed, worker, folder)
        for name, gaps, status in (("idle", idle, status_idle), ("report rendering", loaded, status_loaded)):
            p99 = 1e3 * np.percentile(gaps, 99)
            print(f"   {name:17} worst tick gap {1e3 * gaps.max():7.1f} ms, p99 {p99:6.1f} ms, "
                  f"median {1e3 * np.median(gaps):6.1f} ms over {gaps.size} ticks; run {status}")
        during = took is not None and took < loaded.sum()
        print(f"   report ready {took:.1f} s after it was asked for; the run took {loaded.sum():.1f} s of wall time "
              f"({'rendered during the run' if during else 'NOT done during the run: nothing was tested'})"
              if took is not None else "   report not timed")
        ratio = loaded.max() / idle.max()
        print(f"   worst loaded gap / worst idle gap: {ratio:.2f} (target < 2)")


if __name__ == "__main__":
    main()
