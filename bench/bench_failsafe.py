"""Reaction to an unexpected exception (not a DeviceError) during a fill, on the simulator.

Usage: python bench/bench_failsafe.py [-n N]
For each place (pressure read, valve command, engine step, recorder) and N trigger pressures spread
over the fill of quick-demo, a RuntimeError is raised once; the figures are the samples taken between
the fault and the simulator's TRUE valves reaching the safe state (inlet closed, vent open), the wall
time of that, and whether the exception reached events.jsonl and the catalog row was closed as a fault.
"""

from __future__ import annotations

import argparse
import json
import logging
import statistics
import tempfile
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.runfolder import RunRecorder
from pycnoctl.controller.run.control import Controller
from pycnoctl.controller.run.engine import RunEngine
from pycnoctl.drivers.simulated import build_sim_instrument

PLACES = ("pressure read", "valve command", "engine step", "recorder")


class Injector:
    """Raises once when the cell is filling above ``at`` Pa gauge; notes when the valves are safe."""

    def __init__(self, truth: Any, place: str, at: float) -> None:
        self.truth, self.place, self.at = truth, place, at
        self.samples = 0
        self.fired: tuple[int, float] | None = None
        self.safe: tuple[int, float] | None = None

    def maybe_fire(self, place: str) -> None:
        if place == self.place and self.fired is None and self.truth.actual_valves()["inlet"] \
                and self.truth.gauge_pressure("cell") > self.at:
            self.fired = (self.samples, time.perf_counter())
            raise RuntimeError(f"injected in the {place}")

    def check(self) -> None:
        v = self.truth.actual_valves()
        if self.fired is not None and self.safe is None and not v["inlet"] and v["vent"]:
            self.safe = (self.samples, time.perf_counter())


class Sensor:
    def __init__(self, inner: Any, inj: Injector) -> None:
        self.inner, self.inj = inner, inj

    def read(self) -> Any:
        self.inj.samples += 1
        self.inj.maybe_fire("pressure read")
        return self.inner.read()

    def __getattr__(self, item: str) -> Any:
        return getattr(self.inner, item)


class Board:
    def __init__(self, inner: Any, inj: Injector) -> None:
        self.inner, self.inj = inner, inj

    def set_valves(self, states: Mapping[str, bool]) -> None:
        if dict(states) == {"inlet": False}:
            self.inj.maybe_fire("valve command")
        self.inner.set_valves(states)
        self.inj.check()

    def __getattr__(self, item: str) -> Any:
        return getattr(self.inner, item)


def one(place: str, at: float, folder: Path) -> dict[str, Any]:
    inst = build_sim_instrument()
    inj = Injector(inst.extras["sim"], place, at)
    inst.pressure = Sensor(inst.pressure, inj)
    inst.valves.inner = Board(inst.valves.inner, inj)  # type: ignore[attr-defined]
    step, sample = RunEngine.step, RunRecorder.sample

    def engine_step(self: RunEngine, s: Any) -> None:
        inj.maybe_fire("engine step")
        step(self, s)

    def recorder_sample(self: RunRecorder, *a: Any, **kw: Any) -> None:
        inj.maybe_fire("recorder")
        sample(self, *a, **kw)

    RunEngine.step, RunRecorder.sample = engine_step, recorder_sample  # type: ignore[method-assign]
    try:
        with Catalog(folder / "catalog.sqlite") as cat:
            prepared = prepare(RunRequest("quick-demo"), inst, cat)
            summary = execute(prepared, Controller(inst), root=folder / "runs", catalog=cat)
            row = cat.get_run(summary["run_id"])
    finally:
        RunEngine.step, RunRecorder.sample = step, sample  # type: ignore[method-assign]
        inst.close()
    events = [json.loads(x) for x in (folder / "runs" / summary["run_id"] / "events.jsonl").read_text().splitlines()]
    return {
        "fired": inj.fired is not None,
        "safe": inj.safe is not None and inj.fired is not None,
        "samples": inj.safe[0] - inj.fired[0] if inj.safe and inj.fired else None,
        "ms": (inj.safe[1] - inj.fired[1]) * 1e3 if inj.safe and inj.fired else None,
        "recorded": any(e["kind"] == "exception" and e.get("type") == "RuntimeError" for e in events),
        "closed": row is not None and row.status == "fault" and "RuntimeError" in (row.message or ""),
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("-n", type=int, default=10, help="trigger pressures per place (default 10)")
    args = ap.parse_args()
    logging.getLogger("pycnoctl").addHandler(logging.NullHandler())  # each fault is in its events; not here
    targets = [0.05e5 + i * (1.2e5 - 0.05e5) / max(args.n - 1, 1) for i in range(args.n)]
    print(f"{'place':15} {'runs':>4} {'safe':>5} {'samples max':>11} {'ms p50':>7} {'ms max':>7} "
          f"{'recorded':>8} {'row closed':>10}")
    for place in PLACES:
        res = []
        for at in targets:
            with tempfile.TemporaryDirectory() as d:
                res.append(one(place, at, Path(d)))
        ok = [r for r in res if r["fired"]]
        ms = [r["ms"] for r in ok if r["ms"] is not None]
        print(f"{place:15} {len(ok):4d} {sum(r['safe'] for r in ok):5d} "
              f"{max((r['samples'] for r in ok if r['samples'] is not None), default=-1):11d} "
              f"{statistics.median(ms) if ms else float('nan'):7.2f} {max(ms, default=float('nan')):7.2f} "
              f"{sum(r['recorded'] for r in ok):8d} {sum(r['closed'] for r in ok):10d}")


if __name__ == "__main__":
    main()
