"""Start-up cost of the command line: median wall time of a few `pycnoctl` calls, and each as a ratio
of `python -c pass` measured in the same run (so the figure says how much the CLI adds, whatever the
machine's speed).

Measured as installed: the package's bytecode is compiled first and PYTHONDONTWRITEBYTECODE is
dropped from the environment of the timed commands (an install writes .pyc files; a shell that sets
that variable, as some sandboxes do, would otherwise make every call compile the sources again and
time the compiler).

Usage: python bench/bench_startup.py [-n N]
"""

from __future__ import annotations

import argparse
import compileall
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

CLI = [sys.executable, "-m", "pycnoctl.controller.cli.main"]
COMMANDS: dict[str, list[str]] = {
    "python -c pass": [sys.executable, "-c", "pass"],
    # the floor of any argparse command line built on dataclasses, before a line of pycnoctl runs
    "python -c 'import argparse, dataclasses'": [sys.executable, "-c", "import argparse, dataclasses"],
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


ENV = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}


def compile_package() -> None:
    """Bytecode for every module of the package, as an install leaves it."""
    import pycnoctl

    for folder in {Path(p).resolve() for p in pycnoctl.__path__} | {
            (Path(pycnoctl.__file__).parent / sub).resolve() for sub in ("controller", "drivers", "sim")}:
        compileall.compile_dir(folder, quiet=1)


def wall(cmd: list[str], n: int) -> float:
    """Median wall seconds of n runs (after one warm-up run that fills the OS file cache)."""
    subprocess.run(cmd, capture_output=True, check=True, env=ENV)
    times = []
    for _ in range(n):
        t0 = time.perf_counter()
        subprocess.run(cmd, capture_output=True, check=True, env=ENV)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("-n", type=int, default=15, help="runs per command (median reported)")
    args = ap.parse_args()
    compile_package()
    base = wall(COMMANDS["python -c pass"], args.n)
    print(f"median wall time of {args.n} runs each ({sys.executable}):")
    for name, cmd in COMMANDS.items():
        t = base if name == "python -c pass" else wall(cmd, args.n)
        print(f"  {name:<48} {t * 1e3:8.1f} ms   {t / base:5.1f} x python -c pass")


if __name__ == "__main__":
    main()
