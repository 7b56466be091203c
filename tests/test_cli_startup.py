"""The command line imports only what the verb asked for needs (startup time is in bench/bench_startup.py)."""

from __future__ import annotations

import argparse
import importlib.metadata
import subprocess
import sys

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
    code = ("import sys, contextlib, io\nfrom pycnoctl.controller.cli.main import main\n"
            f"with contextlib.redirect_stdout(io.StringIO()):\n    main({args!r})\n"
            "print(' '.join(sorted(sys.modules)))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    return set(out.split())


def test_help_and_version_import_no_verb_module() -> None:
    for args in (["--help"], ["--version"], []):
        try:
            loaded = _modules_after(args)
        except subprocess.CalledProcessError as exc:  # --help exits through SystemExit(0)
            assert exc.returncode == 0, exc.stderr
            continue
        verbs = {m for m in cli.VERBS.values() if m in loaded}
        assert not verbs and "pint" not in loaded and "yaml" not in loaded, args


def test_compute_imports_neither_pint_nor_the_web_stack() -> None:
    loaded = _modules_after(["compute", "--cell-volume", "12", "--expansion-volume", "8", "--p1", "2.4",
                             "--p2", "1.6", "--mass", "19.62"])
    assert "pycnoctl.controller.cli.compute" in loaded
    assert not {"pint", "httpx", "starlette", "pycnoctl.controller.cli.runs"} & loaded


def test_a_verb_after_the_top_level_option_still_runs(capsys) -> None:
    args = ["compute", "--cell-volume", "12", "--expansion-volume", "8", "--p1", "2.4", "--p2", "1.6"]
    assert cli.main(["--version", *args]) == 0  # the verb's module parses its options; --version wins, as before
    assert capsys.readouterr().out.strip() == importlib.metadata.version("pycnoctl")
