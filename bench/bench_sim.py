"""Speed of the simulator on a measurement-like valve schedule, driven in 0.1 s increments.

Schedule: purge (5 fill/vent flushes), then 8 cycles of vent 20 s, fill (inlet open until the
transducer reads the set pressure minus 2 kPa, or 5 s), settle 30 s, expand, settle 30 s.
At every 0.1 s the pressure transducer is read, as the engine would.  Prints physics steps per
second, simulated seconds per wall second and the ratio to real time.

    python bench/bench_sim.py [config.yaml] [--repeat N]
"""

from __future__ import annotations

import argparse
import time

from pycnoctl.drivers.simulated import build_sim_instrument

DT = 0.1


def run(config: str | None) -> tuple[float, float, int, int]:
    ins = build_sim_instrument(config)
    bench = ins.extras["sim"]
    clock = ins.clock
    roles = ins.roles
    exp_valve = next(iter(roles.expansion.values()))
    valves = ins.valves
    target = bench.config.supply.set_pressure - 2e3
    reads = 0

    def wait(seconds: float, until=None) -> None:  # type: ignore[no-untyped-def]
        nonlocal reads
        t_end = clock.now() + seconds
        while clock.now() < t_end - 1e-9:
            clock.sleep(DT)
            r = ins.pressure.read()
            reads += 1
            if until is not None and r.valid and until(r.value):
                return

    t_wall = time.perf_counter()
    valves.set_valves({v: False for v in valves.valve_names})
    for _ in range(5):  # purge
        valves.set_valves({roles.inlet: True})
        wait(5.0, lambda p: p > target)
        valves.set_valves({roles.inlet: False, roles.vent: True})
        wait(10.0)
        valves.set_valves({roles.vent: False})
    for _ in range(8):
        valves.set_valves({roles.vent: True, exp_valve: True})
        wait(20.0)
        valves.set_valves({roles.vent: False, exp_valve: False})
        valves.set_valves({roles.inlet: True})
        wait(5.0, lambda p: p > target)
        valves.set_valves({roles.inlet: False})
        wait(30.0)
        valves.set_valves({exp_valve: True})
        wait(30.0)
    valves.set_valves({roles.vent: True})
    wall = time.perf_counter() - t_wall
    return clock.now(), wall, bench.steps, reads


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("config", nargs="?", default=None)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    best = None
    for _ in range(args.repeat):
        res = run(args.config)
        if best is None or res[1] < best[1]:
            best = res
    sim_t, wall, steps, reads = best  # type: ignore[misc]
    print(f"config: {args.config or 'clean (default)'}")
    print(f"simulated time        {sim_t:10.1f} s")
    print(f"wall time (best of {args.repeat}) {wall:10.4f} s")
    print(f"physics steps         {steps:10d}   ({steps / wall:,.0f} steps/s)")
    print(f"transducer reads      {reads:10d}   ({wall / reads * 1e6:.2f} us/read incl. stepping)")
    print(f"simulated s / wall s  {sim_t / wall:10,.0f}   (ratio to real time: {sim_t / wall:,.0f}x)")


if __name__ == "__main__":
    main()
