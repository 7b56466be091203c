"""`compare` refuses to compare a run with itself.

Found by a sweep: `compare R R` printed d = 0, U(d) = 0 and En 0.00 (exit 0), as if two runs agreed.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str, str]:
    data = tmp_path_factory.mktemp("data")
    for _ in range(2):
        assert main(["run", "quick-demo", "--sim", "--data", str(data), "--quiet", "--json"]) == 0
    a, b = sorted(p.name for p in (data / "runs").iterdir())
    return data, a, b


def _compare(capsys: pytest.CaptureFixture[str], data: Path, *runs: str) -> tuple[int, str, str]:
    capsys.readouterr()
    code = main(["compare", *runs, "--data", str(data), "--json"])
    out, err = capsys.readouterr()
    return code, out, err


def test_a_run_named_twice_is_refused_as_the_same_run(two_runs, capsys, tmp_path):
    data, a, b = two_runs
    copy = tmp_path / "copy"  # a copy of the record is that run still
    shutil.copytree(data / "runs" / a, copy)
    for runs in ((a, a), (a, str(data / "runs" / a)), (a, b, a), (a, str(copy))):
        code, out, err = _compare(capsys, data, *runs)
        assert (code, out) == (2, ""), runs
        assert len(err.strip().splitlines()) == 1 and f"the same run ({a})" in err, err


def test_two_different_runs_are_compared(two_runs, capsys):
    data, a, b = two_runs
    code, out, err = _compare(capsys, data, a, b)
    assert code == 0 and err == "" and b in out
