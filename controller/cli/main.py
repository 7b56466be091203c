"""The ``pycnoctl`` command line: one entry point, one module per verb.

Each verb lives in its own module exposing ``add_parser(subparsers)``, which registers the verb
and sets ``func`` (taking the parsed args, returning an exit code).  Modules are imported
only when their verb is used, so ``pycnoctl compute`` does not pay for the web stack.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import sys
from collections.abc import Sequence

from pycnoctl.controller.domain.yamlio import ConfigError

# verb -> module that implements it
VERBS: dict[str, str] = {
    "compute": "pycnoctl.controller.cli.compute",
    "run": "pycnoctl.controller.cli.run",
    "check": "pycnoctl.controller.cli.check",
    "analyze": "pycnoctl.controller.cli.analyze",
    "probe": "pycnoctl.controller.cli.probe",
    "calibrate": "pycnoctl.controller.cli.calibrate",
    "runs": "pycnoctl.controller.cli.runs",
    "show": "pycnoctl.controller.cli.show",
    "report": "pycnoctl.controller.cli.report",
    "serve": "pycnoctl.controller.cli.serve",
    "submit": "pycnoctl.controller.cli.client",
    "status": "pycnoctl.controller.cli.client",
    "watch": "pycnoctl.controller.cli.client",
    "abort": "pycnoctl.controller.cli.client",
    "reset": "pycnoctl.controller.cli.client",
    "queue": "pycnoctl.controller.cli.client",
}


class UsageError(Exception):
    """Bad input from the user: reported as one line, exit code 2, no traceback."""


def _available() -> dict[str, str]:
    out = {}
    for verb, mod in VERBS.items():
        try:
            spec = importlib.util.find_spec(mod)
        except ModuleNotFoundError:
            spec = None
        if spec is not None:
            out[verb] = mod
    return out


def build_parser(verbs: dict[str, str] | None = None) -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="pycnoctl",
        description="Run, simulate and analyse gas-expansion pycnometer measurements.",
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    seen: set[str] = set()
    for mod in (verbs if verbs is not None else _available()).values():
        if mod in seen:
            continue
        seen.add(mod)
        importlib.import_module(mod).add_parser(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    verbs = _available()
    # Import only the module for the verb asked for (all of them for --help).
    wanted = {v: m for v, m in verbs.items() if argv and v == argv[0]}
    selected = {v: m for v, m in verbs.items() if m in wanted.values()} if wanted else verbs
    parser = build_parser(selected)
    args = parser.parse_args(argv)
    if args.version:
        from importlib.metadata import version

        print(version("pycnoctl"))
        return 0
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except ConfigError as exc:  # problems in an input file: one positioned line each
        for problem in exc.problems:
            print(problem, file=sys.stderr)
        return 2
    except UsageError as exc:
        print(f"pycnoctl {args.verb}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    # Run the importable module's main: under `python -m` this file is also __main__, whose
    # UsageError is not the one the verbs raise, so it would escape as a traceback.
    from pycnoctl.controller.cli.main import main as _main

    sys.exit(_main())
