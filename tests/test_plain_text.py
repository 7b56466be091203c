"""Names, IDs and notes are plain text: a control character (an escape sequence, a carriage return, a
bell) is refused where text comes in (command line, daemon API, sequence, instrument and simulator
files) and shown escaped where older records hold one (tables and CSV), so it never reaches a
terminal.  Why: an escape sequence in a sample ID recoloured or rewrote the screen of whoever listed
the runs, and went raw into the CSV (found by a robustness sweep; common practice for any program
that prints text others typed)."""

from __future__ import annotations

import json
import sqlite3
from importlib.resources import files
from pathlib import Path

import pytest
from pydantic import ValidationError

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.domain.text import control_problem, visible
from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.controller.run.sequence import load_sequence, resolve_sequence
from pycnoctl.controller.service.schemas import RunRequest
from pycnoctl.drivers.config import load_instrument_config
from pycnoctl.sim.config import load_sim_config, shipped_configs

ESC = "AB\x1b[31mRED\x07"


def test_control_characters_are_found_and_escaped() -> None:
    assert control_problem("soil core 7/b - ünï") is None
    assert "0x1b" in (control_problem(ESC) or "") and "character 3" in (control_problem(ESC) or "")
    assert control_problem("op\rX") is not None
    assert control_problem("two\nlines\tand a tab", note=True) is None
    assert control_problem("two\nlines", note=False) is not None
    assert visible(ESC) == "AB\\x1b[31mRED\\x07"
    assert visible("a\nb") == "a\nb"


@pytest.mark.parametrize("option", ["--sample", "--operator"])
def test_the_command_line_refuses_a_control_character_in_a_name(option: str, tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        cli.main(["run", "quick-demo", "--sim", "--quiet", "--data", str(tmp_path), option, ESC])
    assert exc.value.code == 2
    assert "control character (0x1b)" in capsys.readouterr().err
    assert not (tmp_path / "runs").exists()


def test_the_daemon_api_refuses_it_and_its_schema_says_so() -> None:
    with pytest.raises(ValidationError):
        RunRequest(sequence="quick-demo", sample_id=ESC)
    with pytest.raises(ValidationError):
        RunRequest(sequence="quick-demo", note="bell\x07")
    assert RunRequest(sequence="quick-demo", note="two\nlines").note == "two\nlines"
    assert "pattern" in RunRequest.model_json_schema()["properties"]["sample_id"]


INSTRUMENTS = Path(str(files("pycnoctl.drivers") / "instruments"))


@pytest.mark.parametrize(("source", "name", "loader"), [
    (Path(resolve_sequence("quick-demo")), "quick-demo", load_sequence),
    (Path(shipped_configs()["clean"]), "clean demo pycnometer", load_sim_config),
    (INSTRUMENTS / "usb-relay-serial-gauge.yaml", "soils-bench-pycnometer-2", load_instrument_config),
], ids=["sequence", "simulator", "instrument"])
def test_files_refuse_a_control_character_in_a_name_at_its_line(source: Path, name: str, loader,
                                                                 tmp_path: Path) -> None:
    lines = source.read_text().splitlines()
    at = lines.index(f"name: {name}")
    lines[at] = f'name: "{name}\\e[2J"'  # YAML's escape for ESC: clear the screen
    path = tmp_path / source.name
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(ConfigError) as exc:
        loader(path)
    assert any(str(p).startswith(f"{path}:{at + 1}:") and "control character (0x1b)" in str(p)
               for p in exc.value.problems), exc.value.problems
    assert not any("Value error" in str(p) for p in exc.value.problems)  # pydantic's tag, not ours


def test_an_older_record_is_shown_escaped_in_the_table_and_the_csv(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str],
                                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("COLUMNS", "200")
    assert cli.main(["run", "quick-demo", "--sim", "--quiet", "--json", "--data", str(tmp_path), "--sample", "S1"]) == 0
    run_id = json.loads(capsys.readouterr().out)["run_id"]
    con = sqlite3.connect(tmp_path / "catalog.sqlite")  # a record written before names were checked
    con.execute("UPDATE runs SET sample_id = ? WHERE id = ?", (ESC, run_id))
    con.commit()
    con.close()
    for fmt in ([], ["--csv"]):
        assert cli.main(["runs", "--data", str(tmp_path), *fmt]) == 0
        out = capsys.readouterr().out
        assert "\x1b" not in out and "\x07" not in out
        assert "AB\\x1b[31mRED\\x07" in out


@pytest.mark.parametrize("argv", [["run", "quick-demo", "--sim", "--quiet", "--operator", "op\udcff"],
                                  ["run", "quick-demo", "--sim", "--quiet", "--sample", "\udcff\udcfe"],
                                  ["calibrations", "import", "--sim", "--expansion-volume", "small",
                                   "--cell-volume", "12 cm3", "--u-cell-volume", "0.01 cm3", "--volume", "8 cm3",
                                   "--u-volume", "0.01 cm3", "--note", "bad \udcff byte"]],
                         ids=["operator", "sample", "import-note"])
def test_bytes_that_are_not_utf8_are_refused_where_they_come_in(argv: list[str], tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    # the command line hands such bytes over as lone surrogates: a run failed with a UnicodeEncodeError
    # writing its record and left its catalog row 'running'; an imported note was stored with them
    with pytest.raises(SystemExit) as exc:
        cli.main([*argv, "--data", str(tmp_path)])
    assert exc.value.code == 2
    assert "not valid UTF-8" in capsys.readouterr().err
    assert not (tmp_path / "catalog.sqlite").exists()


def test_a_name_longer_than_the_daemon_allows_is_refused_on_the_command_line(tmp_path: Path,
                                                                         capsys: pytest.CaptureFixture[str]) -> None:
    # the daemon's API takes at most 200 characters; the command line took 5000 (a sweep found it)
    assert cli.main(["run", "quick-demo", "--sim", "--quiet", "--data", str(tmp_path), "--sample", "S" * 200]) == 0
    with pytest.raises(SystemExit) as exc:
        cli.main(["run", "quick-demo", "--sim", "--quiet", "--data", str(tmp_path), "--operator", "o" * 201])
    assert exc.value.code == 2 and "at most 200" in capsys.readouterr().err
    from pycnoctl.controller.service.schemas import RunRequest

    assert RunRequest.model_json_schema()["properties"]["operator"]["maxLength"] == 200
