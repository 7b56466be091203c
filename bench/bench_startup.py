"""Start-up cost of the command line: median wall time of a few `pycnoctl` calls, and each as a ratio
of `python -c pass` measured in the same run (so the figure says how much the CLI adds, whatever the
machine's speed).

Usage: python bench/bench_startup.py [-n N]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time

CLI = [sys.executable, "-m", "pycnoctl.controller.cli.main"]
COMMANDS: dict[str, list[str]] = {
    "python -c pass": [sys.executable, "-c", "pass"],
    "pycnoctl --version": [*CLI, "--version"],
    "pycnoctl --help": [*CLI, "--help"],
    "pycnoctl compute ...": [*CLI, "compute", "--cell-volume", "12 cm3", "--expansion-volume", "8 cm3",
                             "--p1", "2.4 bar", "--p2", "1.6 bar", "--absolute", "--temperature", "25 degC",
                             "--mass", "19.62 g"],
    "pycnoctl compute --u-p in inHg (builds registry)": [*CLI, "compute", "--cell-volume", "12", "--expansion-volume",
                                                       "8", "--p1", "2.4 bar", "--p2", "1.6 bar", "--absolute", "--u-p",
                                                       "0.0001 inHg"],
    "pycnoctl runs --help": [*CLI, "runs", "--help"],
}


def wall(cmd: list[str], n: int) -> float:
    """Median wall seconds of n runs (after one warm-up run that fills the OS file cache)."""
    subprocess.run(cmd, capture_output=True, check=True)
    times = []
    for _ in range(n):
        t0 = time.perf_counter()
        subprocess.run(cmd, capture_output=True, check=True)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("-n", type=int, default=15, help="runs per command (median reported)")
    args = ap.parse_args()
    base = wall(COMMANDS["python -c pass"], args.n)
    print(f"median wall time of {args.n} runs each ({sys.executable}):")
    for name, cmd in COMMANDS.items():
        t = base if name == "python -c pass" else wall(cmd, args.n)
        print(f"  {name:<48} {t * 1e3:8.1f} ms   {t / base:5.1f} x python -c pass")


if __name__ == "__main__":
    main()
