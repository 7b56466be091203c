"""Pieces every instrument-facing verb shares: choosing the instrument, the data folder, problem output."""

from __future__ import annotations

import argparse
from pathlib import Path

from pycnoctl.controller.cli.main import UsageError
from pycnoctl.drivers.instrument import Instrument


def add_instrument_args(p: argparse.ArgumentParser, *, realtime: bool = True) -> None:
    g = p.add_mutually_exclusive_group()
    g.add_argument("--instrument", metavar="CONFIG", help="instrument config (YAML) describing the hardware")
    g.add_argument("--sim", nargs="?", const="", metavar="SIMCONFIG",
                   help="run on the gas-system simulator (its clean default instrument without a file)")
    if realtime:
        p.add_argument("--realtime", action="store_true",
                       help="with --sim: run the simulator in real time instead of as fast as possible")
        p.add_argument("--speed", type=float, default=1.0, metavar="FACTOR",
                       help="with --sim --realtime: simulated seconds per wall second (default 1)")


def add_sample_args(p: argparse.ArgumentParser, *, u_mass_default: str | None) -> None:
    """What the operator says about the specimen and the run, the same for `run` and `submit`."""
    p.add_argument("--sample", default="", metavar="ID", help="specimen identifier for the record")
    p.add_argument("--mass", metavar="VALUE", help="specimen mass for the density, e.g. '19.62 g' (default unit g)")
    p.add_argument("--u-mass", metavar="VALUE", default=u_mass_default,
                   help="standard uncertainty of the mass (default 0.1 mg)")
    p.add_argument("--bulk-volume", metavar="VALUE", help="bulk (envelope) volume for the porosity, e.g. '6 cm^3'")
    p.add_argument("--operator", default="", help="who ran it, for the record")
    p.add_argument("--expansion-volume", metavar="NAME", help="override the sequence's expansion volume")


def add_data_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--data", metavar="DIR",
                   help="folder for run records and the catalog (default $PYCNOCTL_DATA or ./pycnoctl-data)")


def open_instrument(args: argparse.Namespace, *, default_sim: bool = False) -> Instrument:
    """The instrument the flags name; config problems exit 2 with file:line:col lines."""
    try:
        if getattr(args, "instrument", None):
            from pycnoctl.drivers.config import build_instrument, load_instrument_config

            return build_instrument(load_instrument_config(args.instrument))
        if getattr(args, "sim", None) is not None or default_sim:
            from pycnoctl.drivers.simulated import build_sim_instrument

            speed = float(getattr(args, "speed", 1.0) or 1.0)
            if speed <= 0:
                raise UsageError("--speed: must be positive")
            return build_sim_instrument(args.sim or None, realtime=bool(getattr(args, "realtime", False)),
                                        speed=speed)
    except FileNotFoundError as exc:
        raise UsageError(str(exc)) from None
    raise UsageError("name the hardware with --instrument CONFIG, or use --sim [SIMCONFIG]")


def resolve_run_folder(root: Path, ref: str) -> Path:
    """A run named by its ID (in the data folder) or by an explicit folder path."""
    p = Path(ref)
    if (p / "trace.csv").exists():
        return p
    q = root / "runs" / ref
    if (q / "trace.csv").exists():
        return q
    raise UsageError(f"no run {ref!r} (neither a run folder nor an ID under {root / 'runs'})")
