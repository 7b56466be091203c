"""A trace whose sample times are not finite and strictly increasing is a damaged record, for every verb.

Found by a sweep: rows appended twice gave `analyze` an extra 'cycle 4' of a 3-cycle run and a stated
result (exit 0); reversed, repeated or constant times failed in the settle maths ("sample time ... does not
advance past ...", exit 3); a NaN time failed as "settle detector takes only valid, finite samples".
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.domain.devices import Reading
from pycnoctl.controller.record.runfolder import DamagedFile, RunRecorder, load_run


def _lines(folder: Path) -> tuple[str, list[str]]:
    header, *rows = (folder / "trace.csv").read_text().splitlines(keepends=True)
    return header, rows


def _set_t(row: str, value: str) -> str:
    return value + row[row.index(","):]


#: name -> (how the data rows are changed, the line of the file the error must name)
DAMAGE: dict[str, tuple[Callable[[list[str]], list[str]], int]] = {
    "tail appended again": (lambda rows: rows + rows[-3:], 2 + 6),
    "reversed": (lambda rows: rows[::-1], 3),
    "row repeated": (lambda rows: rows[:2] + rows[1:], 4),
    "constant time": (lambda rows: [_set_t(r, "5.0") for r in rows], 3),
    "NaN time": (lambda rows: [*rows[:4], _set_t(rows[4], "nan"), *rows[5:]], 6),
    "infinite time": (lambda rows: [*rows[:4], _set_t(rows[4], "inf"), *rows[5:]], 6),
}


def _record(tmp_path: Path) -> Path:
    rec = RunRecorder(tmp_path, "R20250101T120000Z-abc123", ("inlet",), {})
    for k in range(6):
        rec.sample(k * 0.1, "idle", None, {}, Reading(1e5, "Pa", k * 0.1))
    rec.close()
    (rec.folder / "summary.json").write_text("{}")  # a finished run: its first reader writes trace.npz
    return rec.folder


@pytest.mark.parametrize("how", list(DAMAGE))
def test_load_run_refuses_times_that_do_not_increase_naming_the_file_and_row(tmp_path, how):
    folder = _record(tmp_path)
    assert load_run(folder).n_samples == 6  # the record as written is read
    (folder / "trace.npz").unlink()
    change, line = DAMAGE[how]
    header, rows = _lines(folder)
    (folder / "trace.csv").write_text(header + "".join(change(rows)))
    for _ in range(2):  # from the CSV, then again (from its cache, if one was written)
        with pytest.raises(DamagedFile) as caught:
            load_run(folder)
        assert caught.value.name == "trace.csv" and "'t'" in caught.value.detail
        assert f"row {line} " in caught.value.detail, caught.value.detail


def test_a_trace_without_its_time_column_read_is_not_checked(tmp_path):
    folder = _record(tmp_path)
    header, rows = _lines(folder)
    (folder / "trace.csv").write_text(header + "".join(rows[::-1]))
    assert load_run(folder, trace_columns=("state",)).n_samples == 0  # check.py reads states and valves only


@pytest.fixture(scope="module")
def damaged_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """(data folder, a finished quick-demo run whose trace's last 50 rows were appended again)."""
    data = tmp_path_factory.mktemp("data")
    assert main(["run", "quick-demo", "--sim", "--data", str(data), "--quiet", "--json"]) == 0
    (good,) = (data / "runs").iterdir()
    folder = data / "damaged" / good.name
    shutil.copytree(good, folder)
    (folder / "trace.npz").unlink(missing_ok=True)
    header, rows = _lines(folder)
    (folder / "trace.csv").write_text(header + "".join(rows + rows[-50:]))
    return data, folder


@pytest.mark.parametrize("verb", [["analyze"], ["analyze", "--json"], ["show"], ["show", "--json"], ["report"],
                                  ["report", "--pdf"], ["compare", "FIRST"], ["compare", "SECOND"]])
def test_every_verb_reports_a_reordered_trace_as_a_damaged_record(damaged_run, capsys, verb, tmp_path):
    data, folder = damaged_run
    capsys.readouterr()
    args = [verb[0]]
    if verb[0] == "compare":
        good = data / "runs" / folder.name
        args += [str(folder), str(good)] if verb[1] == "FIRST" else [str(good), str(folder)]
    else:
        args += [str(folder), *verb[1:]]
    if verb[0] == "report":
        args += ["--out", str(tmp_path / ("r.pdf" if "--pdf" in verb else "r.html"))]
    assert main([*args, "--data", str(data)]) == 2
    out, err = capsys.readouterr()
    assert out == "" and len(err.strip().splitlines()) == 1, err
    assert "failed" not in err and str(folder / "trace.csv") in err
    assert f"row {2 + len(_lines(folder)[1]) - 50} " in err  # the first appended row
    assert not (tmp_path / "r.html").exists() and not (tmp_path / "r.pdf").exists()


def test_the_undamaged_run_still_reads(damaged_run, capsys):
    data, folder = damaged_run
    capsys.readouterr()
    assert main(["analyze", folder.name, "--data", str(data), "--json"]) == 0
    assert len(json.loads(capsys.readouterr().out)["cycles"]) == 3
