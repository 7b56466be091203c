"""A broken sequence file is told in one pass: YAML-level problems (a duplicate key) together with the
schema's, a "did you mean" for a misspelt key, and words for a list where one name was expected.

Positions are computed from the test text (``pos``), never pasted from a run.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.controller.run import sequence as sq

BROKEN = """\
format: pycnoctl-sequence/1
name: [first, second]
kind: measure
fill:
  target: 1.3 bar
  target: 1.4 bar
  timout: 60 s
settle:
  window: 10 s
  min_time: 5 s
  max_time: 2 s
expand:
  volume: [small, large]
cycles:
  count: 3
  discrad: 1
  convergence:
    last: 2
"""


def pos(text: str, needle: str) -> tuple[int, int]:
    i = text.index(needle)
    return text.count("\n", 0, i) + 1, i - (text.rfind("\n", 0, i) + 1) + 1


def problems(tmp_path: Path, text: str) -> list[tuple[int, int, str]]:
    path = tmp_path / "broken.yaml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as exc:
        sq.load_sequence(path)
    return [(p.line, p.col, p.message) for p in exc.value.problems]


def test_every_problem_in_one_pass(tmp_path: Path) -> None:
    got = problems(tmp_path, BROKEN)
    by_pos = {(line, col): msg for line, col, msg in got}
    # the duplicate key (a YAML-level problem) no longer hides the schema's problems
    assert "duplicate key 'target'" in by_pos[pos(BROKEN, "target: 1.4")]
    assert by_pos[pos(BROKEN, "timout")] == "unknown key 'timout'; did you mean 'timeout'?"
    assert by_pos[pos(BROKEN, "discrad")] == "unknown key 'discrad'; did you mean 'discard'?"
    assert by_pos[pos(BROKEN, "convergence")] == "unknown key 'convergence'; did you mean 'converge'?"
    assert "min_time (5 s) must not exceed max_time (2 s)" in by_pos[pos(BROKEN, "min_time")]
    name = by_pos[pos(BROKEN, "name:")]
    assert "expected one name, got a list (first, second)" in name and "Input should" not in name
    assert "expected one name, got a list (small, large)" in by_pos[pos(BROKEN, "volume:")]
    assert len(got) == len(by_pos) >= 7  # each problem once


def test_no_guess_for_a_key_nothing_resembles(tmp_path: Path) -> None:
    text = BROKEN.replace("  timout: 60 s\n", "  zzqx: 60 s\n")
    msgs = [m for _, _, m in problems(tmp_path, text)]
    assert "unknown key 'zzqx'" in msgs


def test_check_prints_them_all_with_positions(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "broken.yaml"
    path.write_text(BROKEN, encoding="utf-8")
    assert cli.main(["check", str(path), "--no-dry-run"]) == 2
    err = capsys.readouterr().err.splitlines()
    line, col = pos(BROKEN, "discrad")
    assert f"{path}:{line}:{col}: unknown key 'discrad'; did you mean 'discard'?" in err
    assert any("duplicate key 'target'" in e for e in err) and len(err) >= 7
