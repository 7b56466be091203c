"""Catalog queries from the command line: runs (filters, JSON, CSV) and show (summary, JSON, report)."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import pytest

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.record.catalog import Catalog


@pytest.fixture()
def data(tmp_path: Path) -> Path:
    cat = Catalog(tmp_path / "catalog.sqlite")
    for sample, status, rho in (("AL-01", "completed", 3.94), ("AL-02", "completed", 3.95), ("QZ-01", "fault", None)):
        rid = cat.create_run(kind="measure", sample_id=sample, sequence_name="grain-volume", status="running")
        cat.finish_run(rid, status, volume_m3=5e-6 if rho else None, u_volume_m3=2e-9 if rho else None,
                       density=rho * 1e3 if rho else None, mass=rho * 5e-3 if rho else None)
    cat.close()
    return tmp_path


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str]:
    rc = cli.main(list(argv))
    return rc, capsys.readouterr().out


def test_runs_filters_and_json(data: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rc, out = _run(capsys, "runs", "--data", str(data), "--json")
    rows = json.loads(out)
    assert rc == 0 and [r["sample_id"] for r in rows] == ["QZ-01", "AL-02", "AL-01"]  # newest first
    _, out = _run(capsys, "runs", "--data", str(data), "--json", "--sample", "AL-*")
    assert {r["sample_id"] for r in json.loads(out)} == {"AL-01", "AL-02"}
    _, out = _run(capsys, "runs", "--data", str(data), "--json", "--sample", "AL-01")
    assert [r["sample_id"] for r in json.loads(out)] == ["AL-01"]
    _, out = _run(capsys, "runs", "--data", str(data), "--json", "--status", "fault")
    assert [r["sample_id"] for r in json.loads(out)] == ["QZ-01"]
    _, out = _run(capsys, "runs", "--data", str(data), "--json", "--limit", "1")
    assert len(json.loads(out)) == 1
    _, out = _run(capsys, "runs", "--data", str(data), "--json", "--since", "2999-01-01")
    assert json.loads(out) == []
    _, out = _run(capsys, "runs", "--data", str(data), "--json", "--until", "2999-01-01T00:00:00Z")
    assert len(json.loads(out)) == 3
    assert cli.main(["runs", "--data", str(data), "--since", "yesterday"]) == 2
    assert cli.main(["runs", "--data", str(data), "--status", "lost"]) == 2
    assert cli.main(["runs", "--data", str(data / "nowhere")]) == 2


def test_runs_csv_export(data: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rc, out = _run(capsys, "runs", "--data", str(data), "--csv")
    rows = list(csv.DictReader(io.StringIO(out)))
    assert rc == 0 and len(rows) == 3
    al = next(r for r in rows if r["sample_id"] == "AL-02")
    assert float(al["density_g_cm3"]) == pytest.approx(3.95) and float(al["volume_cm3"]) == pytest.approx(5.0)
    assert float(al["U_volume_cm3"]) == pytest.approx(0.002) and al["status"] == "completed"
    qz = next(r for r in rows if r["sample_id"] == "QZ-01")
    assert qz["density_g_cm3"] == "" and qz["status"] == "fault"


def test_show_and_report(tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("COLUMNS", "200")  # rich tables unwrapped
    rc, out = _run(capsys, "run", "quick-demo", "--sim", "--sample", "TILE-3", "--data", str(tmp_path), "--json",
                   "--mass", "13.2 g")
    run_id = json.loads(out)["run_id"]
    rc, out = _run(capsys, "show", run_id, "--data", str(tmp_path), "--json")
    doc = json.loads(out)
    assert rc == 0 and doc["run_id"] == run_id and doc["results"]["sample_id"] == "TILE-3"
    rc, out = _run(capsys, "show", run_id, "--data", str(tmp_path))
    assert rc == 0 and "uncertainty budget" in out and "repeatability" in out and "TILE-3" in out
    rc, out = _run(capsys, "show", run_id, "--data", str(tmp_path), "--report")
    path = Path(out.strip())
    assert rc == 0 and path.name == "report.html" and path.with_suffix(".png").exists()
    assert cli.main(["show", "R20000101T000000Z-000000", "--data", str(tmp_path)]) == 2
    # the report verb (cmd_report), registered here directly
    parser = cli.build_parser({"report": "pycnoctl.controller.cli.report"})
    args = parser.parse_args(["report", "--samples", "TILE-", "--data", str(tmp_path),
                              "--out", str(tmp_path / "set.html")])
    assert args.func(args) == 0 and "TILE-3" in (tmp_path / "set.html").read_text()


def test_a_run_whose_folder_is_gone_and_a_folder_no_row_names_are_said(tmp_path: Path,
                                                                        capsys: pytest.CaptureFixture[str],
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """Found by a sweep: a run folder deleted while its catalog row remained was listed as completed with
    its volume; a zero-byte catalog listed '0 run(s)' while runs/ held ten folders, with no word."""
    import shutil

    data = tmp_path / "data"
    ids = []
    for _ in range(2):
        assert cli.main(["run", "quick-demo", "--sim", "--data", str(data), "--quiet", "--json"]) == 0
        ids.append(json.loads(capsys.readouterr().out)["run_id"])
    shutil.rmtree(data / "runs" / ids[0])
    monkeypatch.setenv("COLUMNS", "120")
    assert cli.main(["runs", "--data", str(data)]) == 0
    text = capsys.readouterr().out
    line = next(x for x in text.splitlines() if ids[0] in x)
    assert "completed (NO RECORD)" in line and "NO RECORD" not in next(x for x in text.splitlines() if ids[1] in x)
    assert cli.main(["runs", "--data", str(data), "--json"]) == 0
    assert {r["run_id"]: r["record_missing"] for r in json.loads(capsys.readouterr().out)} == {ids[0]: True,
                                                                                               ids[1]: False}
    # a catalog from before the second run (here: a new one): its folder is named
    (data / "catalog.sqlite").unlink()
    for extra in ("-wal", "-shm"):
        (data / f"catalog.sqlite{extra}").unlink(missing_ok=True)
    Catalog(data / "catalog.sqlite").close()
    assert cli.main(["runs", "--data", str(data)]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert f"the runs folder holds 1 run folder the catalog does not list, e.g. {ids[1]}" in text


def test_a_running_row_whose_writer_is_gone_says_so(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    """Found by a sweep: a run killed with SIGKILL stayed 'running' in `runs` until the next writer came.
    Readers take no lock; the lock file names the writer, and a writer whose process is gone is said."""
    import json as _json
    import subprocess
    import sys

    from pycnoctl.controller.record.datalock import LOCK_NAME

    data = tmp_path / "data"
    data.mkdir()
    with Catalog(data / "catalog.sqlite") as cat:
        rid = cat.create_run(kind="measurement", sample_id="AL-0417", sequence_name="quick-demo", status="running")
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True,
                          check=True)
    monkeypatch.setenv("COLUMNS", "140")
    for pid, gone in ((int(dead.stdout), True), (__import__("os").getpid(), False)):
        (data / LOCK_NAME).write_text(_json.dumps({"pid": pid, "command": "pycnoctl run"}) + "\n")
        assert cli.main(["runs", "--data", str(data)]) == 0
        line = next(x for x in capsys.readouterr().out.splitlines() if rid in x)
        assert ("no process: killed?" in line) is gone, line
        assert cli.main(["runs", "--data", str(data), "--json"]) == 0
        assert _json.loads(capsys.readouterr().out)[0]["process_gone"] is gone
