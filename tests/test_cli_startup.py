"""The command line imports only what the verb asked for needs (startup time is in bench/bench_startup.py)."""

from __future__ import annotations

import argparse
import importlib.metadata
import subprocess
import sys

import pytest

from pycnoctl.controller.cli import main as cli


def _helps(parser: argparse.ArgumentParser) -> dict[str, str | None]:
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {a.dest: a.help for a in sub._choices_actions}


def test_light_help_table_matches_what_the_modules_register() -> None:
    full = _helps(cli.build_parser(cli.VERBS))
    light = _helps(cli.build_parser(cli.VERBS, light=True))
    assert full == light
    assert set(full) == set(cli.VERB_TABLE)


def _modules_after(args: list[str]) -> set[str]:
    """The modules a run of the command line with these arguments imports (those loaded when the
    interpreter started are left out, so a site customisation cannot make the tests fail)."""
    code = ("import sys, contextlib, io\nstarted = set(sys.modules)\n"
            "from pycnoctl.controller.cli.main import main\n"
            f"with contextlib.redirect_stdout(io.StringIO()):\n"
            f"    try:\n        main({args!r})\n"
            "    except SystemExit as exc:  # --help exits through SystemExit(0)\n"
            "        assert not exc.code, exc.code\n"
            "print(' '.join(sorted(set(sys.modules) - started)))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    return set(out.split())


# Standard modules the start of the command line leaves to the functions that need them (typing
# only for type checkers, json and csv for --json and --csv; shutil, which pulls in bz2 and lzma,
# replaced by cli.main.terminal_columns): each costs 1-3 ms of a start of about 25 ms.
DEFERRED = {"typing", "json", "csv", "shutil", "bz2", "lzma", "dataclasses", "inspect"}

COMPUTE = ["compute", "--cell-volume", "12 cm3", "--expansion-volume", "8 cm3", "--p1", "2.4 bar", "--p2",
           "1.6 bar", "--absolute", "--temperature", "25 degC", "--mass", "19.62 g"]


def test_help_and_version_import_no_verb_module() -> None:
    for args in (["--help"], ["--version"], []):
        loaded = _modules_after(args)
        verbs = {m for m in cli.VERBS.values() if m in loaded}
        assert not verbs and "pint" not in loaded and "yaml" not in loaded, args
        assert not DEFERRED & loaded, (args, DEFERRED & loaded)


def test_compute_imports_neither_pint_nor_the_web_stack() -> None:
    loaded = _modules_after(["compute", "--cell-volume", "12", "--expansion-volume", "8", "--p1", "2.4",
                             "--p2", "1.6", "--mass", "19.62"])
    assert "pycnoctl.controller.cli.compute" in loaded
    assert not {"pint", "httpx", "starlette", "pycnoctl.controller.cli.runs"} & loaded


@pytest.mark.parametrize("extra", [[], ["--units", "kPa,kg/m3", "--u-p", "50 Pa", "--water-temperature", "21"],
                                   ["--help"]])
def test_compute_leaves_the_deferred_modules_unloaded(extra: list[str]) -> None:
    loaded = _modules_after([*COMPUTE, *extra])
    assert "pycnoctl.controller.cli.compute" in loaded
    assert not DEFERRED & loaded, DEFERRED & loaded


def test_compute_json_and_csv_still_load_what_they_need() -> None:
    # the deferred imports happen where they are used: the same run with --json or --csv loads them
    assert "json" in _modules_after([*COMPUTE, "--json"])
    assert "csv" in _modules_after([*COMPUTE, "--csv"])


def test_terminal_columns_agrees_with_shutil(monkeypatch: pytest.MonkeyPatch) -> None:
    import shutil

    for columns in ("37", "200", "0", "-3", "wide", None):
        if columns is None:
            monkeypatch.delenv("COLUMNS", raising=False)
        else:
            monkeypatch.setenv("COLUMNS", columns)
        assert cli.terminal_columns() == shutil.get_terminal_size().columns, columns


def test_a_verb_after_the_top_level_option_still_runs(capsys) -> None:
    args = ["compute", "--cell-volume", "12", "--expansion-volume", "8", "--p1", "2.4", "--p2", "1.6"]
    assert cli.main(["--version", *args]) == 0  # the verb's module parses its options; --version wins, as before
    assert capsys.readouterr().out.strip() == importlib.metadata.version("pycnoctl")
