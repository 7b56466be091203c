"""Every verb's --help: its own description, every option explained, no reStructuredText markup, and
one spelling for the options verbs share."""

from __future__ import annotations

import argparse
import re

import pytest

from pycnoctl.controller.cli import main as cli

RST = re.compile(r"``|:(?:func|class|meth|mod|ref):`|^\s*\.\. \w+::", re.M)


def _subparsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


VERBS = _subparsers(cli.build_parser(cli.VERBS))


@pytest.mark.parametrize("verb", sorted(VERBS))
def test_every_option_is_explained_and_no_markup(verb: str) -> None:
    p = VERBS[verb]
    text = p.format_help()
    assert not RST.search(text), f"{verb}: reStructuredText markup in --help"
    for action in p._actions:
        if action.help == argparse.SUPPRESS or isinstance(action, argparse._HelpAction):
            continue
        name = "/".join(action.option_strings) or action.dest
        assert action.help and action.help.strip(), f"pycnoctl {verb} {name}: no help text"


@pytest.mark.parametrize("verb", sorted(VERBS))
def test_every_verb_has_its_own_description(verb: str) -> None:
    desc = VERBS[verb].description or ""
    assert len(desc.split()) >= 6, f"{verb}: no description"
    others = {v: (q.description or "") for v, q in VERBS.items() if v != verb}
    assert all(desc != d for d in others.values()), f"{verb} shares its description"


def _option(verb: str, flag: str) -> argparse.Action | None:
    return next((a for a in VERBS[verb]._actions if flag in a.option_strings), None)


def test_shared_options_are_spelt_alike() -> None:
    sims = {v: _option(v, "--sim") for v in VERBS if _option(v, "--sim") is not None}
    assert {"run", "check", "calibrate", "serve"} <= set(sims)
    for verb, a in sims.items():  # --sim [SIMCONFIG] everywhere: the config is optional
        assert a is not None and a.nargs == "?" and a.metavar == "SIMCONFIG", verb
    for verb in ("run", "serve"):  # the simulator's pace, where it means something
        assert _option(verb, "--realtime") is not None and _option(verb, "--speed") is not None, verb
    assert _option("calibrate", "--speed") is None  # its simulated workflow has no pace to set
    for verb in ("run", "check", "calibrate", "runs", "show", "serve", "analyze", "report"):
        assert _option(verb, "--data") is not None, verb
    for verb in ("run", "runs", "show", "calibrate", "compute", "queue", "analyze"):
        assert _option(verb, "--json") is not None and _option(verb, "--csv") is not None, verb


def test_client_verbs_take_the_daemon_address_from_the_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    from pycnoctl.controller.service.client import DaemonClient

    monkeypatch.setenv("PYCNOCTL_URL", "http://127.0.0.1:9")
    with DaemonClient() as c:
        assert c.url == "http://127.0.0.1:9"
    monkeypatch.delenv("PYCNOCTL_URL")
    with DaemonClient() as c:
        assert c.url == "http://127.0.0.1:8765"


def test_unreachable_daemon_is_one_line_and_exit_6(monkeypatch: pytest.MonkeyPatch,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("PYCNOCTL_URL", "http://127.0.0.1:9")  # discard port: nothing listens
    assert cli.main(["status"]) == 6
    err = capsys.readouterr().err
    assert "127.0.0.1:9" in err and "Traceback" not in err


def test_speed_without_the_simulator_is_refused(capsys: pytest.CaptureFixture[str], tmp_path) -> None:
    assert cli.main(["run", "quick-demo", "--speed", "5", "--data", str(tmp_path)]) == 2
    assert "--speed" in capsys.readouterr().err
