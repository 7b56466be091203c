"""Interleaved speed of two checkouts: is one slower than the other?

Runs ``bench_engine.speed`` (a full purge + 8-cycle grain-volume run on the clean simulator) in each
checkout in turn, round after round, so that the machine's drift over minutes falls on both alike, and
prints each round's wall times and the ratio first/second (above 1: the second is faster), then the
median ratio, the ratio of the summed walls and the spread.  Each checkout runs with its own code:
under this interpreter with ``PYTHONPATH`` set to it, or under its own (``--first-python``, for a
checkout whose package is installed in its own environment, as before the ``pycnoctl/`` package
folder existed).

    git worktree add /tmp/before <commit>
    python bench/bench_compare.py /tmp/before . [--rounds 30] [--first-python /tmp/before/.venv/bin/python]
"""

from __future__ import annotations

import argparse
import os
import re
import statistics
import subprocess
import sys
from pathlib import Path

_SPEED = "import sys; sys.path.insert(0, 'bench'); import bench_engine as b; b.speed(5)"


def wall(tree: Path, python: str | None) -> float:
    """Median wall (s) of five runs of bench_engine.speed in ``tree``."""
    env = dict(os.environ) if python else {**os.environ, "PYTHONPATH": str(tree)}
    out = subprocess.run([python or sys.executable, "-c", _SPEED], cwd=tree, env=env, capture_output=True,
                         text=True, check=True).stdout
    m = re.search(r"wall ([0-9.]+) s", out)
    if m is None:
        raise RuntimeError(f"no wall time in the output of {tree}:\n{out}")
    return float(m.group(1))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("first", type=Path, help="checkout measured first in each round (e.g. the older one)")
    ap.add_argument("second", type=Path, help="checkout measured second")
    ap.add_argument("--rounds", type=int, default=20)
    ap.add_argument("--first-python", help="interpreter of the first checkout's own environment")
    ap.add_argument("--second-python", help="interpreter of the second checkout's own environment")
    args = ap.parse_args()
    first, second = args.first.resolve(), args.second.resolve()
    ratios, walls = [], ([], [])
    for i in range(args.rounds):
        a, b = wall(first, args.first_python), wall(second, args.second_python)
        walls[0].append(a)
        walls[1].append(b)
        ratios.append(a / b)
        print(f"round {i + 1:3d}: {a:.3f} s / {b:.3f} s = {a / b:.3f}", flush=True)
    print(f"first / second: median {statistics.median(ratios):.3f}, summed walls {sum(walls[0]) / sum(walls[1]):.3f}, "
          f"spread {min(ratios):.3f}-{max(ratios):.3f} over {args.rounds} rounds (above 1: the second is faster)")


if __name__ == "__main__":
    main()
