"""How far the simulator's default solver settings move the transient paths, against a fine solve.

A fixed valve program on the shipped clean bench (timed 2 s and 8 s fills through its metering
inlet, a fill to the supply pressure, settles, two expansions, vents), with the cell pressure read
every 0.1 s.  The same program runs at the default solver settings and at settings 500 to 2000
times finer (the reference); printed per phase: the largest difference of the cell pressure, and
for each fill the relative difference of the gas let in, read at the cut the closing valve makes.
Settled states do not depend on the solver (conservation is to round-off); this is about paths.

    python bench/bench_sim_accuracy.py [--solver key=value ...]
"""

from __future__ import annotations

import argparse
import copy
import time

import yaml

from pycnoctl.sim.bench import SimBench
from pycnoctl.sim.config import DEFAULT_CONFIG, config_from_dict

DT = 0.1
#: (phase, valve commands, seconds).  Phases sharing a name are reported together.
PROGRAM: list[tuple[str, dict[str, bool], float]] = [
    ("at rest", {"vent": True, "exp_small": True, "exp_large": True}, 5),
    ("closed", {"vent": False, "exp_small": False, "exp_large": False}, 2),
    ("timed fill 2 s", {"inlet": True}, 2),
    ("hold", {"inlet": False}, 30),
    ("vent", {"vent": True}, 10),
    ("closed", {"vent": False}, 2),
    ("timed fill 8 s", {"inlet": True}, 8),
    ("hold", {"inlet": False}, 30),
    ("fill to supply", {"inlet": True}, 40),
    ("settle", {"inlet": False}, 40),
    ("expand small", {"exp_small": True}, 40),
    ("expand large", {"exp_large": True}, 40),
    ("vent", {"vent": True}, 20),
    ("closed", {"vent": False, "exp_small": False, "exp_large": False}, 5),
]
FILLS = ("timed fill 2 s", "timed fill 8 s", "fill to supply")
REFERENCE = {"rel_moles": 1e-4, "interp_tol": 4e-3, "interp_rel": 4e-5, "max_step": 0.01,
             "first_step": 2e-6, "coupling": 1e-3}


def run(solver: dict[str, float]) -> tuple[list[tuple[str, float]], dict[str, float], int, float]:
    data = copy.deepcopy(yaml.safe_load(DEFAULT_CONFIG.read_text(encoding="utf-8")))
    data.setdefault("solver", {}).update(solver)
    bench = SimBench(config_from_dict(data))
    trace: list[tuple[str, float]] = []
    gas_in: dict[str, float] = {}
    previous = None
    w0 = time.perf_counter()
    for name, valves, seconds in PROGRAM:
        bench.set_valves(valves)
        if previous in FILLS:  # the command cut the integration exactly now
            gas_in[previous] = bench.moles("cell")
        previous = name
        for _ in range(round(seconds / DT)):
            bench.advance(DT)
            trace.append((name, bench.pressure("cell")))
    return trace, gas_in, bench.steps, time.perf_counter() - w0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--solver", nargs="*", default=[], metavar="KEY=VALUE",
                    help="solver settings for the run under test (default: the shipped defaults)")
    args = ap.parse_args()
    solver = {k: float(v) for k, v in (item.split("=", 1) for item in args.solver)}
    ref, ref_in, ref_steps, ref_wall = run(REFERENCE)
    got, got_in, steps, wall = run(solver)
    print(f"== simulator paths, clean bench, settings {solver or 'default'} vs reference {REFERENCE}")
    print(f"   steps: {steps:,} ({wall:.2f} s wall) vs reference {ref_steps:,} ({ref_wall:.1f} s wall)")
    worst: dict[str, float] = {}
    for (name, p), (_, p_ref) in zip(got, ref, strict=True):
        worst[name] = max(worst.get(name, 0.0), abs(p - p_ref))
    print("   largest |cell pressure - reference| per phase:")
    for name, err in worst.items():
        print(f"     {name:<16} {err:9.2f} Pa")
    print("   gas let in, relative to the reference:")
    for name in FILLS:
        print(f"     {name:<16} {(got_in[name] - ref_in[name]) / ref_in[name]:+.2e}")


if __name__ == "__main__":
    main()
