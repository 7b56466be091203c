"""pycnoctl run: one measurement, with a live terminal view and a stored record.

The live view (on a terminal) shows the state and phase, the pressure with a short history, each
finished cycle (P1, P2, volume, its standard uncertainty u, whether it is kept), the convergence so
far, and a progress bar with the wall-clock time left, estimated from the settle times this run has
shown.  At the end: the cycles table, the result with its expanded uncertainty U (k = 2) and
standard u, why any cycle was left out, whether the run converged, the calibration used, and a line
saying so when the result came from the simulator.  Pressures are gauge (above ambient).

Exit codes: 0 completed, 2 bad input (or the data folder held by another writer), 3 fault (an
interlock, a sequence failure, an unexpected error, or a record that could not be written during the
run: one line on stderr, details in the run's events), 4 aborted, 5 a leak check that found a leak,
6 a storage fault (disk full, I/O error, read-only media) that kept the run from starting, 7 a result
no specimen can have (below zero or above the sample cell's volume beyond its U: the chamber volumes or
the readings are wrong; the record is kept for re-analysis).
Ctrl-C aborts into the safe state; the record up to that moment is kept.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from pycnoctl.controller.cli.common import (
    add_data_arg,
    add_instrument_args,
    add_sample_args,
    check_before_opening,
    held_log_lines,
    lock_data_folder,
    open_instrument,
    sim_pace,
    stop_requests,
)
from pycnoctl.controller.cli.display import add_output_args, add_units_arg, parse_units
from pycnoctl.controller.cli.main import UsageError

EXIT = {"completed": 0, "fault": 3, "aborted": 4, "interrupted": 4}


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("run", help="run a measurement sequence", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("sequence", help="sequence file, or the name of a shipped one (e.g. grain-volume)")
    add_instrument_args(p)
    add_data_arg(p)
    add_sample_args(p, u_mass_default="0.1 mg")
    add_units_arg(p)
    add_output_args(p, what="the run summary (--csv: its cycles)")
    p.add_argument("--quiet", action="store_true", help="no live view (the final table is still printed)")
    p.set_defaults(func=main)


def request_from_args(args: argparse.Namespace) -> Any:
    from pycnoctl.controller.domain.units import UnitError, parse_mass, parse_volume
    from pycnoctl.controller.jobs.measurement import RunRequest, specimen_problem

    try:
        mass = parse_mass(args.mass) if args.mass else None
        u_mass = parse_mass(args.u_mass) if args.u_mass else 0.0
        bulk = parse_volume(args.bulk_volume) if args.bulk_volume else None
        u_bulk = parse_volume(args.u_bulk_volume) if args.u_bulk_volume else 0.0
    except UnitError as exc:
        raise UsageError(f"--mass/--u-mass/--bulk-volume/--u-bulk-volume: {exc}") from None
    problem = specimen_problem(mass, u_mass, bulk, u_bulk)
    if problem is not None:
        raise UsageError(f"--{problem[0].replace('_', '-')}: {problem[1]}")
    return RunRequest(args.sequence, sample_id=args.sample, mass=mass, u_mass=u_mass, bulk_volume=bulk,
                      u_bulk_volume=u_bulk, operator=args.operator, expansion_volume=args.expansion_volume)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir

    parse_units(args.units)  # a bad --units (or --speed without --sim) is refused before anything runs
    sim_pace(args)
    request = request_from_args(args)
    # every input proved before the data folder is touched or any device opened
    check_before_opening(args, request.sequence, request.expansion_volume, a_run=True)
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
        simulated = "sim" in instrument.extras
        view = None
        if not (args.json or args.csv or args.quiet) and sys.stderr.isatty():
            from pycnoctl.controller.cli.display import console
            from pycnoctl.controller.cli.live import LiveModel, LiveScreen, Plan

            model = LiveModel(Plan.from_sequence(prepared.sequence), simulated=simulated)
            view = LiveScreen(model, parse_units(args.units), console(sys.stderr))
            controller.listeners.append(view.on_event)
        with stop_requests() as stop:
            try:
                if view is not None:
                    view.start()
                from pycnoctl.controller.jobs.calibration_use import CalibrationRefused

                with held_log_lines() as logged:
                    try:
                        summary = execute(prepared, controller, root=root / "runs", catalog=catalog,
                                          should_stop=stop)
                    except CalibrationRefused as exc:  # nothing moved, no record: the operator's input is missing
                        raise UsageError(f"refused: {exc}") from None
            finally:
                if view is not None:
                    view.stop()
        catalog.close()
    finally:
        instrument.close()
    units = parse_units(args.units)
    if args.json:
        print(json.dumps(summary, indent=2))
    elif args.csv:
        from pycnoctl.controller.cli.display import write_csv
        from pycnoctl.controller.cli.result_view import cycle_csv_columns, cycle_records

        write_csv(cycle_records(summary, units), cycle_csv_columns(units), sys.stdout)
    else:
        from pycnoctl.controller.cli.result_view import print_summary

        print_summary(summary, root / "runs" / summary["run_id"], units, simulated=simulated)
    if summary["status"] == "fault":  # one line on stderr; the details are in the run's events
        fault = summary.get("fault") or {}
        print(f"pycnoctl run: run {summary['run_id']} ended in a fault ({fault.get('kind')}): "
              f"{fault.get('message')}; record {root / 'runs' / summary['run_id']}", file=sys.stderr)
    else:
        for line in dict.fromkeys(logged):
            print(f"pycnoctl run: {line}", file=sys.stderr)
    if summary["status"] == "completed" and summary.get("leak_ok") is False:
        return 5
    if summary["status"] == "completed" and summary.get("impossible"):
        from pycnoctl.controller.maths.verdict import EXIT_NOT_A_MEASUREMENT

        return EXIT_NOT_A_MEASUREMENT
    return EXIT.get(summary["status"], 3)
