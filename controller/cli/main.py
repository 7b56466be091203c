"""The ``pycnoctl`` command line: one entry point, one module per verb.

Each verb lives in its own module exposing ``add_parser(subparsers)``, which registers the verb
and sets ``func`` (taking the parsed args, returning an exit code).  Modules are imported
only when their verb is used: ``pycnoctl --help`` lists the verbs from the light table below
(the one-line help each module also registers; a test keeps the two equal), so neither help nor
``pycnoctl compute`` pays for the web stack, the simulator or the unit registry it does not use.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
from collections.abc import Sequence

# verb -> (module that implements it, one-line help shown by `pycnoctl --help`)
VERB_TABLE: dict[str, tuple[str, str]] = {
    "compute": ("pycnoctl.controller.cli.compute", "compute a sample volume (and density) from pressures, offline"),
    "run": ("pycnoctl.controller.cli.run", "run a measurement sequence"),
    "check": ("pycnoctl.controller.cli.check", "validate a sequence and dry-run it on the simulator"),
    "analyze": ("pycnoctl.controller.cli.analyze", "recompute a stored run from its raw trace"),
    "probe": ("pycnoctl.controller.cli.probe", "open every device of an instrument and report how it answers"),
    "calibrate": ("pycnoctl.controller.cli.calibrate", "calibrate the chamber volumes with reference spheres"),
    "calibrations": ("pycnoctl.controller.cli.calibrations",
                     "list, show, select, retire or import chamber calibrations"),
    "runs": ("pycnoctl.controller.cli.runs", "list runs in the catalog"),
    "compare": ("pycnoctl.controller.cli.compare",
                "stored results side by side: differences, their U and the En number"),
    "show": ("pycnoctl.controller.cli.show", "show one stored run"),
    "report": ("pycnoctl.controller.cli.report", "write an HTML report of a run or a sample set"),
    "serve": ("pycnoctl.controller.cli.serve", "run the instrument service with its local API and dashboard"),
    "submit": ("pycnoctl.controller.cli.client", "queue a run on the daemon"),
    "status": ("pycnoctl.controller.cli.client", "one-shot status of the daemon and the instrument"),
    "watch": ("pycnoctl.controller.cli.client", "live terminal view of the daemon (Ctrl-C to leave; the run goes on)"),
    "abort": ("pycnoctl.controller.cli.client", "abort the active run (safe state); the queue pauses"),
    "reset": ("pycnoctl.controller.cli.client",
              "operator reset of a latched interlock (refused while the condition lasts)"),
    "queue": ("pycnoctl.controller.cli.client", "list the run queue; remove a run; resume or pause"),
}
# verb -> module that implements it
VERBS: dict[str, str] = {verb: mod for verb, (mod, _) in VERB_TABLE.items()}


class UsageError(Exception):
    """Bad input from the user: reported as one line, exit code 2, no traceback."""


def terminal_columns() -> int:
    """The terminal's width as ``shutil.get_terminal_size()`` tells it ($COLUMNS when a positive
    number, else the terminal on stdout, else 80), without importing shutil: it pulls in bz2, lzma
    and zlib, 2 ms of every start of the command line."""
    try:
        columns = int(os.environ["COLUMNS"])
    except (KeyError, ValueError):
        columns = 0
    if columns > 0:
        return columns
    stdout = sys.__stdout__
    if stdout is None:
        return 80
    try:
        return os.get_terminal_size(stdout.fileno()).columns or 80
    except (AttributeError, ValueError, OSError):  # stdout closed, detached or not a terminal
        return 80


class HelpFormatter(argparse.HelpFormatter):
    """argparse's help formatter with its width from terminal_columns(): argparse builds one for every
    option it registers, and its own measures the terminal with shutil (see terminal_columns)."""

    def __init__(self, prog: str, indent_increment: int = 2, max_help_position: int = 24,
                 width: int | None = None) -> None:
        super().__init__(prog, indent_increment, max_help_position,
                         terminal_columns() - 2 if width is None else width)


class RawDescriptionHelpFormatter(HelpFormatter, argparse.RawDescriptionHelpFormatter):
    """argparse.RawDescriptionHelpFormatter (the description keeps its line breaks), measured as HelpFormatter."""


def _available() -> dict[str, str]:
    """Every verb of the table: each module ships with the package (a search of the import path for
    each one cost `--help` and every verb a few milliseconds at start-up, for nothing)."""
    return dict(VERBS)


def build_parser(verbs: dict[str, str] | None = None, *, light: bool = False) -> argparse.ArgumentParser:
    """The parser for these verbs (all available ones by default).

    ``light``: register each verb from VERB_TABLE with its one-line help only, importing nothing;
    enough for ``pycnoctl --help`` and ``--version``, not for running a verb.
    """
    parser = argparse.ArgumentParser(
        prog="pycnoctl",
        description="Run, simulate and analyse gas-expansion pycnometer measurements.",
        formatter_class=HelpFormatter,
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    chosen = verbs if verbs is not None else _available()
    if light:
        for verb in chosen:
            sub.add_parser(verb, help=VERB_TABLE[verb][1] if verb in VERB_TABLE else None,
                           formatter_class=HelpFormatter)
        return parser
    seen: set[str] = set()
    for mod in chosen.values():
        if mod in seen:
            continue
        seen.add(mod)
        importlib.import_module(mod).add_parser(sub)
    return parser


def _verb_of(argv: Sequence[str]) -> str | None:
    """The verb word of a command line: the first word that is not an option (the top-level options
    take no value)."""
    return next((a for a in argv if not a.startswith("-")), None)


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    verbs = _available()
    # Import only the module of the verb asked for; without one, list the verbs from the light table.
    verb = _verb_of(argv)
    if verb in verbs:
        parser = build_parser({v: m for v, m in verbs.items() if m == verbs[verb]})
    else:
        parser = build_parser(verbs, light=True)
    args = parser.parse_args(argv)
    if args.version:
        from pycnoctl import __version__  # importlib.metadata costs 20 ms of a 40 ms start

        print(__version__)
        return 0
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except UsageError as exc:
        print(f"pycnoctl {args.verb}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # the reader left (| head): nothing more to say, and nobody to say it to
        import contextlib  # here, not at the top: no start of the command line pays for it

        with contextlib.suppress(OSError):
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - replaces stdout for the interpreter's exit flush
        return 141
    except Exception as exc:
        # problems in an input file: one positioned line each.  yamlio is not imported up front (it
        # pulls in YAML and pydantic); an exception can only be its ConfigError if it was loaded.
        yamlio = sys.modules.get("pycnoctl.controller.domain.yamlio")
        if yamlio is not None and isinstance(exc, yamlio.ConfigError):
            for problem in exc.problems:
                print(problem, file=sys.stderr)
            return 2
        # a run record damaged or edited by hand is bad input too (as `analyze` says it): one line naming the file
        runfolder = sys.modules.get("pycnoctl.controller.record.runfolder")
        if runfolder is not None and isinstance(exc, runfolder.DamagedFile):
            print(f"pycnoctl {args.verb}: error: the run's record cannot be read: {exc}", file=sys.stderr)
            return 2
        # so is a catalog refused as damaged or locked (its message names the file and the way out)
        catalog = sys.modules.get("pycnoctl.controller.record.catalog")
        if catalog is not None and isinstance(exc, catalog.CatalogError):
            print(f"pycnoctl {args.verb}: error: {exc}", file=sys.stderr)
            return 2
        # never a traceback to the user: one line, exit 3 (PYCNOCTL_DEBUG=1 shows it)
        if os.environ.get("PYCNOCTL_DEBUG"):
            raise
        from pycnoctl.controller.record import storagefault as storage

        cause = storage.storage_cause(exc)
        if isinstance(exc, storage.StorageFault) or cause is not None:
            # disk full, I/O error, read-only media: a condition of the machine, told as one (exit 6)
            text = str(exc) if isinstance(exc, storage.StorageFault) else f"{cause}: {exc}"
            print(f"pycnoctl {args.verb}: storage fault: {text}", file=sys.stderr)
            return int(storage.EXIT_STORAGE)
        print(f"pycnoctl {args.verb}: failed: {type(exc).__name__}: {exc}", file=sys.stderr)
        return 3


if __name__ == "__main__":  # through the package module, so its UsageError is the one the verbs raise
    from pycnoctl.controller.cli.main import main as package_main

    sys.exit(package_main())
