"""A stored result that disagrees with itself or with the catalog is never shown as fact.

Found by a sweep: with summary.json's volume edited to 5.5 and its U to 0, `show` printed 5.50000 cm3 +/-
0.00000 and the report '± 0.00000 cm³ (expanded, k = 2; standard 0.00114 cm³)', while the run's own cycles,
its density and the catalog still said 4.99979.  The checks (record/integrity.py): the volume is the mean of
the kept cycles (as maths.uncertainty.combine_run takes it), U is k times the standard u, and the catalog
row keeps the same volume and U (both are written from one float at the run's end)."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.record.integrity import disagreements


@pytest.fixture
def run(tmp_path: Path, capsys) -> tuple[Path, str]:
    assert main(["run", "quick-demo", "--sim", "--data", str(tmp_path), "--quiet", "--json"]) == 0
    rid = json.loads(capsys.readouterr().out)["run_id"]
    return tmp_path, rid


def _edit_summary(data: Path, rid: str, **results) -> None:
    path = data / "runs" / rid / "summary.json"
    doc = json.loads(path.read_text())
    doc["results"].update(results)
    path.write_text(json.dumps(doc))


def _show(data: Path, rid: str, capsys) -> str:
    assert main(["show", rid, "--data", str(data)]) == 0
    return capsys.readouterr().out


def test_a_run_as_written_agrees_with_itself_and_its_catalog(run, capsys):
    data, rid = run
    assert "RECORD DISAGREES" not in _show(data, rid, capsys)
    assert main(["report", rid, "--data", str(data)]) == 0
    assert "RECORD DISAGREES" not in (data / "runs" / rid / "report.html").read_text()


def test_an_edited_summary_is_flagged_in_show_and_the_report(run, capsys):
    data, rid = run
    _edit_summary(data, rid, volume_cm3=5.5, volume_u_cm3=0.0)
    text = " ".join(_show(data, rid, capsys).split())
    assert "RECORD DISAGREES: the stored volume (5.5) is not the mean of its kept cycles" in text
    assert "the stored U (0.0 cm3) is not k = 2 times its standard uncertainty" in text
    assert "the catalog keeps another volume for this run" in text
    assert main(["report", rid, "--data", str(data)]) == 0
    capsys.readouterr()
    assert "RECORD DISAGREES" in (data / "runs" / rid / "report.html").read_text()


def test_an_edited_catalog_row_is_flagged(run, capsys):
    data, rid = run
    with sqlite3.connect(data / "catalog.sqlite") as con:
        con.execute("UPDATE runs SET volume_m3 = volume_m3 * 1.01 WHERE id = ?", (rid,))
    text = " ".join(_show(data, rid, capsys).split())
    assert "RECORD DISAGREES: the catalog keeps another volume for this run" in text


def test_the_checks_take_a_result_with_no_volume_as_agreeing():
    assert disagreements({"volume_cm3": None, "cycles": [{"kept": False, "volume_cm3": 5.0}]}) == []
    assert disagreements({}) == []


@pytest.mark.parametrize(("change", "want"), [
    ({"cov": [[-1e-15, 0.0], [0.0, 1e-15]]}, "a negative variance"),
    ({"vc": "12 cm3"}, "'calibration.vc' is not a positive volume"),
    ({"cov": "exact"}, "not a 2 x 2 matrix"),
    ({"cov": [[1e-15, 5e-15], [5e-15, 1e-15]]}, "a correlation beyond +/-1"),
    ({"cov": [[1e-15, 5e-16], [-5e-16, 1e-15]]}, "is not symmetric"),
])
def test_a_summary_whose_chamber_volumes_are_damaged_is_a_damaged_record(run, capsys, change, want):
    # found by a sweep: the report failed on a complex square root (a negative variance) or on multiplying
    # text (exit 3, 'failed: TypeError'); a damaged record is one line, exit 2, naming the file
    data, rid = run
    path = data / "runs" / rid / "summary.json"
    doc = json.loads(path.read_text())
    doc["calibration"].update(change)
    path.write_text(json.dumps(doc))
    for verb in (["report", rid], ["show", rid]):
        assert main([*verb, "--data", str(data)]) == 2
        err = capsys.readouterr().err
        assert "summary.json" in err and want in err, err


def test_a_folder_without_its_meta_json_is_named_not_blamed_on_the_report_place(run, tmp_path, capsys):
    # found by a sweep: 'cannot write the report (... not a run folder (no meta.json)): choose another place'
    data, rid = run
    (data / "runs" / rid / "meta.json").unlink()
    out = tmp_path / "elsewhere.html"
    assert main(["report", str(data / "runs" / rid), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "meta.json: missing: this is not a run folder" in err and "choose another place" not in err
    assert not out.exists()


def test_compare_and_the_sample_set_report_do_not_take_an_edited_result(tmp_path, capsys):
    """Found by a sweep: with one run's summary edited to 4.9 cm3, compare gave En 1.50 and 'differs ... by
    more than the uncertainties allow' with no alarm; with a catalog volume edited to 5.2 cm3 the sample-set
    report's mean took it.  compare now says RECORD DISAGREES for that run; the sample set leaves it out."""
    data = tmp_path / "data"
    ids = []
    for _ in range(2):
        assert main(["run", "quick-demo", "--sim", "--sample", "CER-1", "--data", str(data), "--quiet", "--json"]) == 0
        ids.append(json.loads(capsys.readouterr().out)["run_id"])
    _edit_summary(data, ids[1], volume_cm3=4.9)
    assert main(["compare", *ids, "--data", str(data), "--json"]) == 0
    captured = capsys.readouterr()
    rows = json.loads(captured.out)
    assert f"{ids[1]}: RECORD DISAGREES" in captured.err
    assert [r["record_disagrees"] is not None for r in rows] == [False, True]
    with sqlite3.connect(data / "catalog.sqlite") as con:
        con.execute("UPDATE runs SET volume_m3 = 5.2e-6 WHERE id = ?", (ids[0],))
    out = tmp_path / "set.html"
    assert main(["report", "--samples", "CER", "--data", str(data), "--out", str(out)]) == 0
    text = out.read_text()
    assert f"{ids[0]} (left out: record disagrees)" in text and f"{ids[1]} (left out: record disagrees)" in text
