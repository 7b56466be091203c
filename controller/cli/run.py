"""``pycnoctl run``: one measurement, with a live terminal view and a stored record.

Exit codes: 0 completed, 2 bad input (or the data folder held by another writer), 3 fault (an
interlock, a sequence failure, an unexpected error, or a record that could not be written during the
run: one line on stderr, details in the run's events), 4 aborted, 5 a leak check that found a leak,
6 a storage fault (disk full, I/O error, read-only media) that kept the run from starting.
Ctrl-C aborts into the safe state; the record up to that moment is kept.
"""

from __future__ import annotations

import argparse
import json
import signal
import sys
import time
from typing import Any

from pycnoctl.controller.cli.common import (
    add_data_arg,
    add_instrument_args,
    add_sample_args,
    check_before_opening,
    held_log_lines,
    lock_data_folder,
    open_instrument,
)
from pycnoctl.controller.cli.main import UsageError
from pycnoctl.controller.domain.states import RunState

EXIT = {"completed": 0, "fault": 3, "aborted": 4, "interrupted": 4}


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("run", help="run a measurement sequence", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("sequence", help="sequence file, or the name of a shipped one (e.g. grain-volume)")
    add_instrument_args(p)
    add_data_arg(p)
    add_sample_args(p, u_mass_default="0.1 mg")
    p.add_argument("--json", action="store_true", help="print the run summary as JSON instead of tables")
    p.add_argument("--quiet", action="store_true", help="no live view")
    p.set_defaults(func=main)


def request_from_args(args: argparse.Namespace) -> Any:
    from pycnoctl.controller.domain.units import UnitError, parse_mass, parse_volume
    from pycnoctl.controller.jobs.measurement import RunRequest

    try:
        mass = parse_mass(args.mass) if args.mass else None
        u_mass = parse_mass(args.u_mass) if args.u_mass else 0.0
        bulk = parse_volume(args.bulk_volume) if args.bulk_volume else None
    except UnitError as exc:
        raise UsageError(f"--mass/--u-mass/--bulk-volume: {exc}") from None
    if mass is not None and mass <= 0:
        raise UsageError("--mass: must be positive")
    return RunRequest(args.sequence, sample_id=args.sample, mass=mass, u_mass=u_mass, bulk_volume=bulk,
                      operator=args.operator, expansion_volume=args.expansion_volume)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir

    request = request_from_args(args)
    # every input proved before the data folder is touched or any device opened
    check_before_opening(args, request.sequence, request.expansion_volume)
    root = data_dir(args.data)
    lock = lock_data_folder(root, "run")  # before any device is opened: a second writer touches nothing
    try:
        return _run(args, request, root)
    finally:
        lock.release()


def _run(args: argparse.Namespace, request: Any, root: Any) -> int:
    from pycnoctl.controller.jobs.measurement import execute, prepare
    from pycnoctl.controller.record.catalog import Catalog
    from pycnoctl.controller.run.control import Controller
    from pycnoctl.controller.run.sequence import SequenceNotFound

    instrument = open_instrument(args)
    try:
        catalog = Catalog(root / "catalog.sqlite")
        try:
            prepared = prepare(request, instrument, catalog)
        except SequenceNotFound as exc:
            raise UsageError(str(exc)) from None
        except ValueError as exc:
            raise UsageError(str(exc)) from None
        controller = Controller(instrument)
        view = None if (args.json or args.quiet) else LiveView(prepared, sys.stderr)
        if view is not None:
            controller.listeners.append(view.on_event)
        stop = {"flag": False}

        def on_sigint(signum: int, frame: Any) -> None:
            stop["flag"] = True

        old = signal.signal(signal.SIGINT, on_sigint)
        try:
            if view is not None:
                view.start()
            with held_log_lines() as logged:
                summary = execute(prepared, controller, root=root / "runs", catalog=catalog,
                                  should_stop=lambda: stop["flag"])
        finally:
            signal.signal(signal.SIGINT, old)
            if view is not None:
                view.stop()
        catalog.close()
    finally:
        instrument.close()
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print_summary(summary, root / "runs" / summary["run_id"])
    if summary["status"] == "fault":  # one line on stderr; the details are in the run's events
        fault = summary.get("fault") or {}
        print(f"pycnoctl run: run {summary['run_id']} ended in a fault ({fault.get('kind')}): "
              f"{fault.get('message')}; record {root / 'runs' / summary['run_id']}", file=sys.stderr)
    else:
        for line in dict.fromkeys(logged):
            print(f"pycnoctl run: {line}", file=sys.stderr)
    if summary["status"] == "completed" and summary.get("leak_ok") is False:
        return 5
    return EXIT.get(summary["status"], 3)


class LiveView:
    """A small live panel on stderr: state, pressure, cycle k of n, instrument time and time left."""

    def __init__(self, prepared: Any, stream: Any) -> None:
        from rich.console import Console

        from pycnoctl.controller.run.sequence import estimate_duration

        self.console = Console(file=stream)
        self.seq = prepared.sequence
        self.expected = estimate_duration(self.seq)
        self.state, self.cycle, self.gauge, self.t0, self.t = "idle", 0, float("nan"), None, 0.0
        self.message = ""
        self._cycle_t: list[float] = []  # instrument time at each cycle start
        self._live: Any = None
        self._next = 0.0

    def start(self) -> None:
        from rich.live import Live

        self._live = Live(self._render(), console=self.console, refresh_per_second=8, transient=True)
        self._live.start()

    def stop(self) -> None:
        if self._live is not None:
            self._live.stop()

    def on_event(self, kind: str, data: dict[str, Any]) -> None:
        if kind == "sample":
            self.gauge, self.t = data["gauge"], data["t"]
            self.t0 = self.t if self.t0 is None else self.t0
            self.state = data["state"]
        elif kind == "cycle":
            self.cycle = data["cycle"]
            self._cycle_t.append(self.t)
        elif kind == "trip":
            self.message = f"INTERLOCK {data['interlock']}: {data['message']}"
        elif kind == "settled" and data.get("which") == "p2":
            self.message = f"cycle {data['cycle']} expanded and settled"
        now = time.monotonic()
        if self._live is not None and now >= self._next:
            self._next = now + 0.125
            self._live.update(self._render())

    def _render(self) -> Any:
        from rich.table import Table

        elapsed = self.t - (self.t0 or self.t)
        table = Table.grid(padding=(0, 2))
        left = max(self.expected - elapsed, 0.0)
        if len(self._cycle_t) >= 2 and self.seq.expands:  # measured pace beats the static estimate
            per_cycle = (self._cycle_t[-1] - self._cycle_t[0]) / (len(self._cycle_t) - 1)
            left = max(per_cycle * (self.seq.cycles.count - len(self._cycle_t) + 1) - (self.t - self._cycle_t[-1]),
                       0.0)
        table.add_row("sequence", f"{self.seq.name} ({self.seq.kind})")
        table.add_row("state", f"[bold]{RunState(self.state).look.label}[/]")
        table.add_row("pressure", f"{self.gauge / 1e5:8.5f} bar gauge" if self.gauge == self.gauge else "invalid")
        if self.seq.expands:
            table.add_row("cycle", f"{self.cycle} of {self.seq.cycles.count}")
        remaining = f"about {left:.0f} s left" if left > 0 else "estimating time left"
        table.add_row("instrument time", f"{elapsed:7.1f} s ({remaining})")
        if self.message:
            table.add_row("", self.message)
        return table


def print_summary(summary: dict[str, Any], folder: Any) -> None:
    from rich.console import Console
    from rich.table import Table

    con = Console()
    if summary["cycles"]:
        table = Table(title=f"run {summary['run_id']} - {summary['sequence']['name']}")
        for col in ("cycle", "P1 / bar g", "P2 / bar g", "volume / cm3", "u / cm3", "kept", "flags"):
            table.add_column(col, justify="right")
        for c in summary["cycles"]:
            table.add_row(str(c["index"]), f"{c['p1_gauge_pa'] / 1e5:.5f}", f"{c['p2_gauge_pa'] / 1e5:.5f}",
                          _fmt(c["volume_cm3"], 5), _fmt(c["u_volume_cm3"], 5), "yes" if c["kept"] else "no",
                          ", ".join(c["flags"]))
        con.print(table)
    con.print(f"status: [bold]{summary['status']}[/]   expansion volume: {summary['expansion_volume']}   "
              f"gas: {summary['gas']}")
    if summary.get("fault"):
        con.print(f"[red]fault ({summary['fault']['kind']}): {summary['fault']['message']}[/]")
    if summary.get("volume_cm3") is not None:
        con.print(f"volume: {summary['volume_cm3']:.5f} cm3 +/- {summary['volume_u_cm3']:.5f} cm3 "
                  f"(expanded, k={summary['k']:g}); RSD {summary['rsd'] * 100 if summary['rsd'] else 0:.3f} %")
    if summary.get("density_g_cm3") is not None:
        con.print(f"density: {summary['density_g_cm3']:.5f} g/cm3 +/- {summary['density_u_g_cm3']:.5f} g/cm3 "
                  f"(k={summary['k']:g})")
    if summary.get("leak_rate_pa_s") is not None:
        verdict = "passed" if summary.get("leak_ok") else "FAILED"
        con.print(f"leak check {verdict}: {summary['leak_rate_pa_s']:.3f} Pa/s")
    for w in summary.get("warnings", []):
        con.print(f"[yellow]warning: {w}[/]")
    con.print(f"record: {folder}")


def _fmt(x: float | None, digits: int) -> str:
    return "-" if x is None else f"{x:.{digits}f}"
