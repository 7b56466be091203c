"""Cost of /api/status as the daemon ages, and of event-stream fan-out as clients are added.

* status: Daemon.snapshot() (what /api/status returns, and what every new event stream sends first)
  on a fresh daemon (10 ticks of statistics) and after 20,000 ticks; the tick statistics alone too,
  and the former way (sorting the 20,000-tick window per request) as a baseline in the same run.
* fan-out: N stream readers each taking the same 1,000 events from the bus as JSON text: one
  serialisation per event shared by all readers (EventBus.since_text), against each reader
  serialising every event itself (the former way).  Both times include publishing the events
  once (the same for both), so the growth with N is the fan-out's.

Lateness values are drawn from a log-normal around 2 ms (seeded), as ticks on a busy machine.

    python bench/bench_status.py [--repeat N]
"""

from __future__ import annotations

import argparse
import json
import random
import sys
import tempfile
from pathlib import Path

from pycnoctl.controller.service.daemon import Daemon, EventBus, LoopStats
from pycnoctl.drivers.simulated import build_sim_instrument

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_catalog import median_time


def sorted_window_summary(stats: LoopStats) -> dict[str, float]:
    """The former LoopStats.summary: sort the whole window on every request."""
    vals = sorted(stats.values())

    def q(p: float) -> float:
        return vals[min(len(vals) - 1, int(p * (len(vals) - 1) + 0.5))] * 1e3

    return {"p50_ms": q(0.5), "p99_ms": q(0.99), "max_ms": vals[-1] * 1e3}


def bench_status(repeat: int) -> None:
    rng = random.Random(7)
    inst = build_sim_instrument(None)
    with tempfile.TemporaryDirectory() as d:
        daemon = Daemon(inst, d)  # not started: the snapshot is what a request pays
        rows = []
        for ticks in (10, 20_000, 200_000):
            daemon.stats.clear()
            for _ in range(ticks):
                daemon.stats.add(rng.lognormvariate(-6.2, 1.0))
            rows.append((ticks, median_time(daemon.snapshot, repeat), median_time(daemon.stats.summary, repeat),
                         median_time(lambda: sorted_window_summary(daemon.stats), max(repeat // 10, 5))))
        daemon.catalog.close()
    print(f"/api/status cost (median of {repeat} calls):")
    print(f"  {'ticks seen':>10}  {'snapshot':>10}  {'tick stats':>10}  {'former sort':>11}")
    for ticks, snap, summ, old in rows:
        print(f"  {ticks:>10}  {snap * 1e3:7.3f} ms  {summ * 1e3:7.3f} ms  {old * 1e3:8.3f} ms")
    fresh, aged = rows[0], rows[1]
    print(f"  ratio after 20k ticks / fresh: snapshot {aged[1] / fresh[1]:.2f}, tick stats {aged[2] / fresh[2]:.2f} "
          f"(former sort: {aged[3] / fresh[3]:.1f})")


def filled_bus(events: int) -> EventBus:
    """An event bus holding ``events`` sample events, as a run publishes them."""
    bus = EventBus(maxlen=4096)
    for i in range(events):
        bus.publish("sample", {"t": i * 0.1, "gauge_pa": 1e5 + i, "valid": True, "state": "settle_filled",
                               "valves": {"inlet": False, "vent": False, "exp_small": True}})
    return bus


def read_shared(bus: EventBus, clients: int, events: int) -> None:
    """Every stream client reads the events as the daemon serves them: one shared text per event."""
    for _ in range(clients):
        bus.since_text(0, limit=events)


def bench_fanout(repeat: int) -> None:
    events = 1000
    print(f"event fan-out: {events} sample events read by N streams (median of {repeat}):")
    base_new = base_old = 0.0
    for clients in (1, 10, 50):
        def new_way(c: int = clients) -> None:
            read_shared(filled_bus(events), c, events)

        def old_way(c: int = clients) -> None:
            fresh = filled_bus(events)
            for _ in range(c):
                for _s, _k, data in fresh.since(0, limit=events)[0]:
                    json.dumps(data, default=str)

        t_new, t_old = median_time(new_way, repeat), median_time(old_way, repeat)
        if clients == 1:
            base_new, base_old = t_new, t_old
        print(f"  {clients:>3} streams: shared text {t_new * 1e3:7.2f} ms (x{t_new / base_new:4.1f} of 1 stream)   "
              f"each serialising {t_old * 1e3:7.2f} ms (x{t_old / base_old:4.1f})")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--repeat", type=int, default=300)
    args = ap.parse_args()
    bench_status(args.repeat)
    bench_fanout(max(args.repeat // 30, 5))


if __name__ == "__main__":
    main()
