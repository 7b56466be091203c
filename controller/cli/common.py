"""Pieces every instrument-facing verb shares: choosing the instrument, the data folder, problem output."""

from __future__ import annotations

import argparse
import logging
import signal
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from pycnoctl.controller.cli.main import UsageError
from pycnoctl.controller.domain.yamlio import ConfigError, Problem
from pycnoctl.controller.record.datalock import DataFolderBusy, DataLock, acquire
from pycnoctl.drivers.instrument import Instrument

ROLES = ("valves", "pressure", "thermometer", "barometer")


#: characters a sample ID or an operator's name may have, as the daemon's API allows
MAX_NAME = 200


def plain_arg(text: str) -> str:
    """An argparse type for a name or ID: plain text (a control character would reach every terminal and
    CSV that later shows it), at most MAX_NAME characters (5000 were taken, and split the runs table)."""
    _plain_or_refuse(text, note=False)
    if len(text) > MAX_NAME:
        raise argparse.ArgumentTypeError(f"{len(text)} characters; at most {MAX_NAME}, as the daemon allows")
    return text


def note_arg(text: str) -> str:
    """An argparse type for a note: plain text apart from line breaks and tabs."""
    _plain_or_refuse(text, note=True)
    return text


def _plain_or_refuse(text: str, *, note: bool) -> None:
    from pycnoctl.controller.domain.text import control_problem

    problem = control_problem(text, note=note)
    if problem is not None:
        raise argparse.ArgumentTypeError(problem)


def _seed(text: str) -> int:
    """A whole number from 0 up: the simulator's generator takes no negative seed (it ended in a traceback)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"{value} is negative; a seed is a whole number from 0 up")
    return value


def add_instrument_args(p: argparse.ArgumentParser, *, realtime: bool = True, always_realtime: bool = False) -> None:
    """--instrument CONFIG | --sim [SIMCONFIG], and the simulator's pace: one spelling on every verb.

    always_realtime: the verb always runs the simulator on the wall clock (serve); --realtime is then
    accepted, so that every verb takes the same command line."""
    g = p.add_mutually_exclusive_group()
    g.add_argument("--instrument", metavar="CONFIG", help="instrument config (YAML) describing the hardware")
    g.add_argument("--sim", nargs="?", const="", metavar="SIMCONFIG",
                   help="run on the gas-system simulator (its clean default instrument without a file)")
    p.add_argument("--seed", type=_seed, metavar="N",
                   help="with --sim: pin the simulator's noise (default: a fresh realisation every time; each "
                        "run records the seed it had, so --seed with it replays that run)")
    if always_realtime:
        p.add_argument("--realtime", action="store_true",
                       help="with --sim: the simulator runs in real time (always so for the service; accepted "
                            "for the same command line as run)")
    elif realtime:
        p.add_argument("--realtime", action="store_true",
                       help="with --sim: run the simulator in real time instead of as fast as possible")
    if realtime or always_realtime:
        p.add_argument("--speed", type=float, default=None, metavar="FACTOR",
                       help="with --sim: simulated seconds per wall second, e.g. 10 (implies --realtime; "
                            "default 1)")


def sim_pace(args: argparse.Namespace) -> tuple[bool, float]:
    """(realtime, speed) from --realtime/--speed: --speed implies --realtime; both need --sim."""
    speed = getattr(args, "speed", None)
    realtime = bool(getattr(args, "realtime", False)) or speed is not None
    if realtime and getattr(args, "sim", None) is None:
        raise UsageError(f"{'--speed' if speed is not None else '--realtime'}: only with --sim (the simulator); "
                         "real hardware always runs on the wall clock")
    if speed is not None and not (0 < speed <= 1000):
        raise UsageError("--speed: must be in (0, 1000]")
    return realtime, 1.0 if speed is None else float(speed)


def sim_seed(args: argparse.Namespace) -> int | None:
    """--seed, which only the simulator takes."""
    seed = getattr(args, "seed", None)
    if seed is not None and getattr(args, "sim", None) is None:
        raise UsageError("--seed: only with --sim (the simulator); real hardware has its own noise")
    return seed


def add_sample_args(p: argparse.ArgumentParser, *, u_mass_default: str | None) -> None:
    """What the operator says about the specimen and the run, the same for `run` and `submit`."""
    p.add_argument("--sample", default="", metavar="ID", type=plain_arg, help="specimen identifier for the record")
    p.add_argument("--mass", metavar="VALUE", help="specimen mass for the density, e.g. '19.62 g' (default unit g)")
    p.add_argument("--u-mass", metavar="VALUE", default=u_mass_default,
                   help="standard uncertainty of the mass (default 0.1 mg)")
    p.add_argument("--bulk-volume", metavar="VALUE", help="bulk (envelope) volume for the porosity, e.g. '6 cm^3'")
    p.add_argument("--u-bulk-volume", metavar="VALUE",
                   help="standard uncertainty of the bulk volume, e.g. '0.02 cm^3' (default: none; the porosity's "
                        "U then leaves it out and says so)")
    p.add_argument("--operator", default="", type=plain_arg, help="who ran it, for the record")
    p.add_argument("--expansion-volume", metavar="NAME", help="override the sequence's expansion volume")


def data_folder_arg(text: str) -> str:
    """An argparse type for --data: a folder, or a path where one can be made (an existing file there
    ended in 'File exists' or a FileExistsError traceback)."""
    path = Path(text)
    if path.exists() and not path.is_dir():
        raise argparse.ArgumentTypeError(f"{text} is a file, not a folder: give the folder for run records "
                                         "and the catalog (made if missing)")
    return text


def add_data_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--data", metavar="DIR", type=data_folder_arg,
                   help="folder for run records and the catalog (default $PYCNOCTL_DATA, else "
                        "$XDG_DATA_HOME/pycnoctl, i.e. ~/.local/share/pycnoctl)")


@contextmanager
def held_log_lines(level: int = logging.WARNING) -> Iterator[list[str]]:
    """Hold what pycnoctl logs (one line each, no tracebacks) so the verb decides what the user sees:
    the run's events already keep every detail, a fault is told in one line."""
    lines: list[str] = []

    class _Hold(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            lines.append(record.getMessage().splitlines()[0] if record.getMessage() else "")

    handler = _Hold(level)
    logger = logging.getLogger("pycnoctl")
    logger.addHandler(handler)
    try:
        yield lines
    finally:
        logger.removeHandler(handler)


_STOP_REASONS = {"SIGINT": "stopped by the operator (Ctrl-C)", "SIGTERM": "stopped by SIGTERM (a kill)",
                 "SIGHUP": "stopped by SIGHUP (the terminal or session closed)"}


class StopRequest:
    """A stop asked by a signal, read by the work at its next step: a measurement then ends through its
    safe state and closes its record as aborted.  While the verb waits at a prompt nothing would read
    the request, so there it interrupts at once (no valve moves while a prompt waits)."""

    def __init__(self) -> None:
        self.reason: str | None = None
        self._at_prompt = False

    def __call__(self) -> str | bool:
        return self.reason or False

    def _on_signal(self, signum: int, frame: Any) -> None:
        self.reason = _STOP_REASONS.get(signal.Signals(signum).name, f"stopped by signal {signum}")
        if self._at_prompt:
            raise KeyboardInterrupt

    @contextmanager
    def prompting(self) -> Iterator[None]:
        self._at_prompt = True
        try:
            if self.reason:
                raise KeyboardInterrupt
            yield
        finally:
            self._at_prompt = False


@contextmanager
def stop_requests() -> Iterator[StopRequest]:
    """Ctrl-C (SIGINT), a kill (SIGTERM) and a closed terminal (SIGHUP) all ask the work to stop; left to
    their defaults the last two ended the process with whatever valves were open and the catalog row
    still 'running'.  The previous handlers come back on the way out."""
    stop = StopRequest()
    stopping = [signal.SIGINT, signal.SIGTERM, *([signal.SIGHUP] if hasattr(signal, "SIGHUP") else [])]
    old = {sig: signal.signal(sig, stop._on_signal) for sig in stopping}
    try:
        yield stop
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)


def lock_data_folder(root: Path, verb: str, *, mark_interrupted: bool = True) -> DataLock:
    """Take the data folder's writer lock before any device is opened; a live owner -> exit 2, one line.

    With the lock held no other writer is alive, so every run still 'running' in the catalog was left
    by a killed process: it is marked interrupted (never resumed) and one line says so."""
    import sys

    from pycnoctl.controller.record.catalog import Catalog

    try:
        lock = acquire(root, f"pycnoctl {verb}")
    except DataFolderBusy as exc:
        raise UsageError(str(exc)) from None
    except OSError as exc:  # read-only media, disk full, no permission: a writer cannot work here
        from pycnoctl.controller.record.storagefault import StorageFault, storage_cause

        cause = storage_cause(exc)
        if cause is not None:  # a condition of the machine, not of the input: exit 6
            raise StorageFault(f"cannot lock the data folder {root} ({cause}): {exc.strerror or exc}") from None
        raise UsageError(f"cannot lock the data folder {root}: {exc.strerror or exc}") from None
    catalog_path = root / "catalog.sqlite"
    if mark_interrupted and catalog_path.exists():  # the daemon marks them itself (and pauses its queue)
        prev = lock.stale or {}
        who = f"pid {prev.get('pid', '?')}, {prev.get('command', 'an earlier writer')}" if prev else "an earlier writer"
        with Catalog(catalog_path) as catalog:
            ids = catalog.mark_interrupted_on_startup(f"{who} stopped while running; not resumed",
                                                      runs_dir=root / "runs")
        if ids:
            print(f"pycnoctl {verb}: run {', '.join(ids)} was left running by {who}; marked interrupted",
                  file=sys.stderr)
    return lock
def absent_ports(path: str | Path, cfg: Any) -> list[Problem]:
    """Serial device paths in an instrument config that do not exist on this machine, positioned.

    Checked before any port is opened, so a missing gauge cannot leave the relay board opened
    (and its watchdog armed) behind a refusal.  URLs (socket://, loop://) and TCP links are left to
    the open itself."""
    from pycnoctl.controller.domain.yamlio import load_file

    doc = load_file(path)
    out = []
    for role in ROLES:
        dev = getattr(cfg, role, None)
        port = getattr(dev, "port", None)
        if getattr(dev, "link", "serial") == "tcp" or not isinstance(port, str) or "://" in port:
            continue
        if not Path(port).exists():
            out.append(doc.problem((role, "port"), f"{role}.port: no device at {port} (unplugged, or another path?)"))
    return out


def check_before_opening(args: argparse.Namespace, sequence: str | Path | None,
                         expansion_volume: str | None = None, *, one_volume: bool = True,
                         a_run: bool = False) -> None:
    """Everything that can be proved without a device, proved before any device is opened: the
    instrument config, the ports it names, the sequence file and the sequence against the config's
    names, limits and sample period.  A refusal after opening would already have commanded the valves (closing an
    instrument asserts the safe state).  one_volume: the run uses the sequence's (or the given)
    expansion volume, so it must be one the instrument has.  a_run: the sequence is a run of its own
    (`run`), which a calibration sequence is not (run.sequence.not_for_a_run)."""
    from pycnoctl.controller.run.sequence import (
        SequenceNotFound,
        check_against_instrument,
        load_sequence,
        not_for_a_run,
        resolve_sequence,
    )

    facts: tuple[list[str], float, str, float] | None = None
    if getattr(args, "instrument", None):
        from pycnoctl.drivers.config import load_instrument_config

        cfg = load_instrument_config(args.instrument)
        problems = absent_ports(args.instrument, cfg)
        if problems:
            raise ConfigError(problems)
        if cfg.chambers is not None and cfg.limits is not None:
            facts = list(cfg.chambers.expansion), cfg.limits.max_pressure, cfg.gas, cfg.sample_period
    elif getattr(args, "sim", None):  # a simulator config file: its problems too, before the data folder
        from pycnoctl.sim.config import load_sim_config

        try:
            load_sim_config(args.sim)
        except FileNotFoundError as exc:
            raise UsageError(str(exc)) from None
    if sequence is None:
        return
    try:
        seq = load_sequence(resolve_sequence(sequence))
    except SequenceNotFound as exc:
        raise UsageError(str(exc)) from None
    why = not_for_a_run(seq) if a_run else None
    if why is not None:
        raise UsageError(why)
    if facts is None:  # a simulated instrument: prepare() checks against it once it is built
        return
    names, max_pressure, gas, sample_period = facts
    problems, _ = check_against_instrument(seq, expansion_volumes=names, max_pressure=max_pressure, gas=gas,
                                           sample_period=sample_period)
    if problems:
        raise ConfigError(problems)
    choice = expansion_volume or seq.expand.volume
    if one_volume and choice != "auto":
        from pycnoctl.controller.jobs.measurement import unknown_volume

        unknown = unknown_volume(choice, names)
        if unknown is not None:
            raise UsageError(unknown)


def _open_failure(path: str | Path, exc: Exception) -> ConfigError:
    """A device that would not open, reported at its port (or resource) in the instrument config."""
    from pycnoctl.controller.domain.devices import DeviceError
    from pycnoctl.controller.domain.yamlio import load_file

    doc = load_file(path)
    role = exc.device if isinstance(exc, DeviceError) else ""
    data = doc.data.get(role) if isinstance(doc.data, dict) else None
    key = next((k for k in ("port", "resource", "host") if isinstance(data, dict) and k in data), None)
    loc: tuple[str, ...] = (role, key) if role and key else (role,) if role else ()
    return ConfigError([doc.problem(loc, str(exc))])


def open_instrument(args: argparse.Namespace, *, default_sim: bool = False) -> Instrument:
    """The instrument the flags name; config problems exit 2 with file:line:col lines."""
    try:
        if getattr(args, "instrument", None):
            from pycnoctl.controller.domain.devices import DeviceError
            from pycnoctl.drivers.config import build_instrument, load_instrument_config

            cfg = load_instrument_config(args.instrument)
            try:
                return build_instrument(cfg)
            except (DeviceError, ValueError) as exc:  # a port that will not open, a board it cannot drive
                raise _open_failure(args.instrument, exc) from None
        if getattr(args, "sim", None) is not None or default_sim:
            from pycnoctl.drivers.simulated import build_sim_instrument

            realtime, speed = sim_pace(args)
            return build_sim_instrument(args.sim or None, realtime=realtime, speed=speed, seed=sim_seed(args))
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
