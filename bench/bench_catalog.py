"""Cost of durability on this machine: one catalog commit (WAL + synchronous=FULL) and one trace row;
and the cost of catalog queries as the catalog grows: an exact sample match, a sample prefix page
(`runs --sample 'AL-00*'`), the same prefix by fetching every run and filtering in Python (how it was
done before), and the sample-set report's query, on generated catalogs of 10k and 100k runs.

Usage: python bench/bench_catalog.py [--dir DIR] [-n N] [--runs 10000,100000] [--skip-commit]
DIR defaults to a temporary folder under the current directory, so the figures are for the disk
the data will live on (a tmpfs /tmp would make fsync free and the figures meaningless).
A prefix page costs O(log N + m log m) for m matching runs (an index range, then a sort by time of
the m matches): flat as the catalog grows, but growing with m, as the lines for 'AL-004*', 'AL-00*'
and 'A*' show.  Generated catalog: samples AL-, TI-, SI-, ZR-, CU- numbered 0000 up to runs/50 per family, so every
sample has about 10 runs and the prefix AL-00 covers 100 samples (about 1 % of the runs).
"""

from __future__ import annotations

import argparse
import datetime as dt
import random
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

from pycnoctl.controller.cli.runs import query
from pycnoctl.controller.domain.devices import Reading
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.report import sample_set
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


def generated_catalog(path: Path, n: int, seed: int = 1) -> Catalog:
    """A catalog of n finished runs, ten minutes apart, inserted in one transaction."""
    cat = Catalog(path)
    rng = random.Random(seed)
    t0 = dt.datetime(2025, 1, 1, tzinfo=dt.UTC)
    rows = []
    for i in range(n):
        created = t0 + dt.timedelta(seconds=600 * i + rng.randint(0, 300))
        rid = f"R{created:%Y%m%dT%H%M%S}Z-{i:06x}"
        sample = f"{rng.choice(['AL', 'TI', 'SI', 'ZR', 'CU'])}-{rng.randint(0, max(n // 50 - 1, 1)):04d}"
        status = rng.choice(["completed"] * 8 + ["fault", "aborted"])
        rows.append((rid, created.strftime("%Y-%m-%dT%H:%M:%S.%fZ"), sample, "grain-volume", "measure", status, rid,
                     rng.uniform(5e-6, 7e-6), rng.uniform(2000, 4000)))
    with cat._write() as con:
        con.executemany("INSERT INTO runs (id, created, sample_id, sequence_name, kind, status, folder, volume_m3,"
                        " density) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)", rows)
    return cat


def median_time(fn: Callable[[], object], repeat: int) -> float:
    fn()  # warm the page cache
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def _python_filter(cat: Catalog, prefix: str, limit: int) -> list[object]:
    """The former way: every run fetched, the prefix filtered in Python."""
    return [r for r in cat.list_runs(limit=1_000_000) if (r.sample_id or "").startswith(prefix)][:limit]


def bench_queries(folder: Path, sizes: list[int]) -> None:
    print("catalog queries (median wall time through pycnoctl.controller.cli.runs.query, limit 50):")
    for n in sizes:
        _bench_size(folder, n)


def _bench_size(folder: Path, n: int) -> None:
    t0 = time.perf_counter()
    cat = generated_catalog(folder / f"runs-{n}.sqlite", n)
    built = time.perf_counter() - t0
    exact = median_time(lambda: query(cat, sample="AL-0042", limit=50), 51)
    n_exact = len(query(cat, sample="AL-0042", limit=50))
    prefix = median_time(lambda: query(cat, sample="AL-00*", limit=50), 51)
    # the same query returning as many rows as the exact one: the index work compared, not the
    # cost of reading and building 50 rows against a handful
    equal = median_time(lambda: query(cat, sample="AL-00*", limit=n_exact), 51)
    matches = len(cat.list_runs(sample_prefix="AL-00", limit=None))
    same = median_time(lambda: query(cat, sample="AL-0042*", limit=50), 51)
    narrow = median_time(lambda: query(cat, sample="AL-004*", limit=50), 51)
    few = len(cat.list_runs(sample_prefix="AL-004", limit=None))
    deep = median_time(lambda: query(cat, sample="A*", limit=50), 21)
    deep_equal = median_time(lambda: query(cat, sample="A*", limit=n_exact), 21)
    assert query(cat, sample="A*", limit=50) == [r for r in _python_filter(cat, "A", 50)]
    wide = len(cat.list_runs(sample_prefix="A", limit=None))
    page = query(cat, sample="AL-00*", limit=50)
    nxt = median_time(lambda: query(cat, sample="AL-00*", limit=50, before=page[-1].id), 51)
    sset = median_time(lambda: sample_set(cat, prefix="AL-00"), 11)
    old = median_time(lambda: _python_filter(cat, "AL-00", 50), 3)
    assert _python_filter(cat, "AL-00", 50) == page
    cat.close()
    print(f"  {n} runs (generated in {built:.1f} s):")
    print(f"    exact sample 'AL-0042' ({n_exact} runs)        {exact * 1e3:8.3f} ms")
    print(f"    prefix 'AL-00*' ({matches} matching runs)   {prefix * 1e3:8.3f} ms   "
          f"ratio to exact {prefix / exact:5.1f}  (a page of 50 rows against {n_exact})")
    print(f"    the same, first {n_exact} rows only          {equal * 1e3:8.3f} ms   "
          f"ratio to exact {equal / exact:5.1f}  (rows for rows)")
    print(f"    prefix 'AL-0042*' (the same runs)       {same * 1e3:8.3f} ms   ratio to exact {same / exact:5.1f}")
    print(f"    prefix 'AL-004*' ({few} matching runs)   {narrow * 1e3:8.3f} ms   ratio to exact {narrow / exact:5.1f}")
    print(f"    its next page (--before)               {nxt * 1e3:8.3f} ms   ratio to exact {nxt / exact:5.1f}")
    print(f"    prefix 'A*' ({wide} matching runs)      {deep * 1e3:8.3f} ms   ratio to exact {deep / exact:5.1f}")
    print(f"    the same, first {n_exact} rows only          {deep_equal * 1e3:8.3f} ms   "
          f"ratio to exact {deep_equal / exact:5.1f}  (rows for rows)")
    print(f"    sample set 'AL-00' (report --samples)  {sset * 1e3:8.3f} ms")
    print(f"    former way: fetch all, filter in Python {old * 1e3:8.1f} ms   "
          f"ratio to the SQL prefix query {old / prefix:6.0f}")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--dir", type=Path, default=None)
    ap.add_argument("-n", type=int, default=2000)
    ap.add_argument("--runs", default="10000,100000", help="catalog sizes for the query figures (comma-separated)")
    ap.add_argument("--skip-commit", action="store_true", help="only the query figures")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=args.dir or Path.cwd(), prefix=".bench-") as d:
        folder = Path(d)
        bench_queries(folder, [int(x) for x in args.runs.split(",") if x])
        if args.skip_commit:
            return
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
