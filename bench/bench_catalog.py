"""Cost of durability on this machine: one catalog commit (WAL + synchronous=FULL) and one trace row.

Usage: python bench/bench_catalog.py [--dir DIR] [-n N]
DIR defaults to a temporary folder under the current directory, so the figures are for the disk
the data will live on (a tmpfs /tmp would make fsync free and the figures meaningless).
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

from pycnoctl.controller.domain.devices import Reading
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.runfolder import RunRecorder


def _pct(xs: list[float], q: float) -> float:
    s = sorted(xs)
    return s[min(len(s) - 1, int(q * len(s)))]


def bench_catalog(folder: Path, n: int) -> list[float]:
    cat = Catalog(folder / "bench.sqlite")
    rid = cat.create_run(kind="measurement", sample_id="bench")
    cat.update_status(rid, "running")
    out = []
    for i in range(n):
        t0 = time.perf_counter()
        cat.update_status(rid, "running", message=f"cycle {i}")  # one run-row update, one commit
        out.append(time.perf_counter() - t0)
    cat.close()
    return out


def bench_trace(folder: Path, n: int, fsync_interval: float, background: bool) -> list[float]:
    rec = RunRecorder(folder, f"trace-{fsync_interval:g}-{int(background)}", ["inlet", "vent", "exp_small"], {},
                      fsync_interval=fsync_interval, sync_in_background=background)
    valves = {"inlet": True, "vent": False, "exp_small": False}
    temp = Reading(296.15, "K", 0.0)
    out = []
    for k in range(n):
        p = Reading(1.0e5 + k, "Pa", k * 0.1)
        t0 = time.perf_counter()
        rec.sample(k * 0.1, "fill", 1, valves, p, temp, 101325.0)
        out.append(time.perf_counter() - t0)
    rec.close()
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--dir", type=Path, default=None)
    ap.add_argument("-n", type=int, default=2000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=args.dir or Path.cwd(), prefix=".bench-") as d:
        folder = Path(d)
        c = bench_catalog(folder, args.n)
        print(f"catalog run-row update, WAL + synchronous=FULL, n={args.n} ({folder}):")
        print(f"  mean {statistics.mean(c) * 1e3:.3f} ms   p50 {_pct(c, 0.5) * 1e3:.3f} ms   "
              f"p99 {_pct(c, 0.99) * 1e3:.3f} ms   max {max(c) * 1e3:.3f} ms")
        print(f"  share of a 100 ms sample period (mean): {statistics.mean(c) / 0.1 * 100:.2f} %")
        for interval, background, what in (
            (1.0, True, "flush per row in the caller, fsync <= 1/s in the background (default)"),
            (1.0, False, "flush per row, fsync <= 1/s in the caller"),
            (0.0, False, "flush + fsync every row in the caller"),
        ):
            tr = bench_trace(folder, args.n, interval, background)
            print(f"trace append ({what}), n={args.n}:")
            print(f"  mean {statistics.mean(tr) * 1e6:.1f} us   p99 {_pct(tr, 0.99) * 1e6:.1f} us   "
                  f"max {max(tr) * 1e6:.1f} us")


if __name__ == "__main__":
    main()
