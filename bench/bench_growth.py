"""Growth: each quantity 10x, and what its cost does (time and memory ratios; 10.0 is linear).

* cycles per run: quick-demo with 3 and with 30 cycles on the clean simulator: CPU of the run's thread
  and the Python heap's peak during it (tracemalloc), the record written as usual;
* catalog runs: 10,000 and 100,000 generated runs: an exact-sample query and a prefix query whose
  matches do not grow with the catalog (both should stay flat: index lookups);
* event-stream clients: 5 and 50 readers of the same 1,000 events (one serialisation per event shared);
* trace rows are bench/bench_trace.py's (57,700 -> 577,000 rows: analyze and report time and memory).

    python bench/bench_growth.py
"""

from __future__ import annotations

import copy
import logging
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import yaml

from pycnoctl.controller.cli.runs import query
from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.run.control import Controller
from pycnoctl.controller.run.sequence import resolve_sequence
from pycnoctl.drivers.simulated import build_sim_instrument

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_catalog import generated_catalog, median_time
from bench_status import filled_bus, read_shared


def cycles(n: int, root: Path, *, traced: bool) -> tuple[float, float]:
    """(CPU s, Python heap peak bytes) of one quick-demo run of n cycles; the peak only when traced
    (tracemalloc slows the run, so CPU and memory come from separate runs)."""
    data = copy.deepcopy(yaml.safe_load(resolve_sequence("quick-demo").read_text()))
    data["cycles"]["count"] = n
    data["name"] = f"quick-demo-{n}"
    seq = root / f"q{n}.yaml"
    seq.write_text(yaml.safe_dump(data))
    inst = build_sim_instrument(None, seed=1)
    cat = Catalog(root / f"c{n}-{traced}.sqlite")
    if traced:
        tracemalloc.start()
    c0 = time.thread_time()
    summary = execute(prepare(RunRequest(seq), inst), Controller(inst), root=root / f"runs{n}-{traced}", catalog=cat)
    cpu = time.thread_time() - c0
    peak = tracemalloc.get_traced_memory()[1] if traced else 0
    if traced:
        tracemalloc.stop()
    cat.close()
    inst.close()
    assert len(summary["cycles"]) == n, summary["status"]
    return cpu, peak


def fanout(clients: int, events: int = 1000) -> float:
    return median_time(lambda: read_shared(filled_bus(events), clients, events), 7)


def main() -> None:
    logging.disable(logging.WARNING)
    with tempfile.TemporaryDirectory(dir=".") as tmp:
        root = Path(tmp)
        print("== growth: each quantity 10x; ratios of cost (10.0 = linear, 1.0 = flat)")
        cycles(3, root, traced=False)  # warm: imports and first-use caches are not the run's cost
        c3, c30 = cycles(3, root, traced=False)[0], cycles(30, root, traced=False)[0]
        m3, m30 = cycles(3, root, traced=True)[1], cycles(30, root, traced=True)[1]
        print(f"   cycles per run 3 -> 30: CPU {c3:.3f} -> {c30:.3f} s ({c30 / c3:.1f}x), "
              f"heap peak {m3 / 1e6:.2f} -> {m30 / 1e6:.2f} MB ({m30 / m3:.1f}x)")
        times = {}
        for n in (10_000, 100_000):
            cat = generated_catalog(root / f"runs-{n}.sqlite", n)
            times[n] = (median_time(lambda c=cat: query(c, sample="AL-0042", limit=50), 51),
                        median_time(lambda c=cat: query(c, sample="AL-0042*", limit=50), 51))
            cat.close()
        (e1, p1), (e2, p2) = times[10_000], times[100_000]
        print(f"   catalog runs 10k -> 100k: exact sample {1e3 * e1:.3f} -> {1e3 * e2:.3f} ms ({e2 / e1:.1f}x), "
              f"prefix with the same matches {1e3 * p1:.3f} -> {1e3 * p2:.3f} ms ({p2 / p1:.1f}x)")
        f5, f50 = fanout(5), fanout(50)
        print(f"   event-stream clients 5 -> 50 (1,000 events): {1e3 * f5:.2f} -> {1e3 * f50:.2f} ms ({f50 / f5:.1f}x)")
        print("   trace rows 57,700 -> 577,000: see bench/bench_trace.py")


if __name__ == "__main__":
    main()
