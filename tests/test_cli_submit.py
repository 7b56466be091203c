"""`pycnoctl submit` treats bad input as `pycnoctl run` does: one line, exit 2 (not a daemon refusal, 1)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.service.api import serve_in_thread
from pycnoctl.controller.service.daemon import Daemon
from pycnoctl.drivers.simulated import build_sim_instrument


@pytest.fixture
def url(tmp_path: Path) -> Iterator[str]:
    inst = build_sim_instrument(None)
    d = Daemon(inst, tmp_path / "data")
    try:
        with serve_in_thread(d) as u:
            yield u
    finally:
        d.catalog.close()
        inst.close()


@pytest.mark.parametrize(("argv", "says"), [
    (["nonexist.yaml"], "no sequence file 'nonexist.yaml'"),
    (["nonexist"], "no sequence file 'nonexist'"),
    (["quick-demo", "--mass", "abc"], "--mass"),
    (["quick-demo", "--bulk-volume", "3 parsecs"], "--bulk-volume"),
    (["quick-demo", "--mass", "50 kg"], "--mass"),  # a quantity, but no specimen: the daemon names the field
    # not 'no sequence file': it is shipped, and refused as a run (pycnoctl calibrate runs it)
    (["calibration"], "calibration: sequence 'calibration' is a calibration sequence"),
])
def test_bad_input_is_exit_2_in_one_line(url: str, argv: list[str], says: str, capsys: Any) -> None:
    rc = main(["submit", *argv, "--url", url])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2, err
    assert len(err) == 1 and says in err[0]


def test_a_good_submit_still_queues(url: str, capsys: Any) -> None:
    assert main(["submit", "quick-demo.yaml", "--mass", "19.62 g", "--url", url]) == 0
    assert capsys.readouterr().out.startswith("queued ")


def test_a_local_sequence_file_with_problems_is_bad_input(url: str, tmp_path: Path, capsys: Any) -> None:
    """Its problems each at their line, exit 2 as `run` gives for the same file (was 1, 'refused')."""
    bad = tmp_path / "bad.yaml"
    bad.write_text(Path(__file__).resolve().parents[1].joinpath("sequences", "quick-demo.yaml").read_text()
                   .replace("  count: 3", "  count: lots"), encoding="utf-8")
    assert main(["submit", str(bad), "--url", url]) == 2
    err = capsys.readouterr().err
    line = 1 + bad.read_text().splitlines().index("  count: lots")
    assert f"{bad}:{line}:" in err and "cycles.count" in err and "<submitted>" not in err
