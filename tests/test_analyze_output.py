"""What `analyze` prints and returns for recomputations that keep no cycle, or lose one: found by a sweep."""

from __future__ import annotations

import csv
import json
import shutil
from collections.abc import Callable
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main

Row = dict[str, str]


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A finished quick-demo run (3 cycles, the first discarded as warm-up) on the simulator."""
    data = tmp_path_factory.mktemp("data")
    assert main(["run", "quick-demo", "--sim", "--data", str(data), "--quiet", "--json"]) == 0
    (folder,) = (data / "runs").iterdir()
    return folder


def edited_copy(demo_run: Path, tmp_path: Path, edit: Callable[[Row], Row | None]) -> Path:
    """A copy of the run in tmp_path/runs whose trace rows are passed through edit (None drops the row)."""
    folder = tmp_path / "runs" / demo_run.name
    shutil.copytree(demo_run, folder)
    (folder / "trace.npz").unlink(missing_ok=True)
    with open(folder / "trace.csv", newline="") as fh:
        reader = csv.DictReader(fh)
        header, rows = list(reader.fieldnames or []), list(reader)
    with open(folder / "trace.csv", "w", newline="") as fh:
        writer = csv.DictWriter(fh, header, lineterminator="\n")
        writer.writeheader()
        writer.writerows(r for r in (edit(row) for row in rows) if r is not None)
    return folder


def analyze(capsys: pytest.CaptureFixture[str], folder: Path, *extra: str) -> tuple[int, str, str]:
    capsys.readouterr()
    code = main(["analyze", str(folder), "--data", str(folder.parent.parent), *extra])
    out, err = capsys.readouterr()
    return code, out, err


def _no_ambient_before_fill(n: int) -> Callable[[Row], Row]:
    """No lab pressure in the baseline before fill n (the trace numbers it with the cycle before)."""
    def edit(row: Row) -> Row:
        return {**row, "ambient_pa": "nan"} if (row["state"], row["cycle"]) == ("baseline", str(n - 1)) else row
    return edit


def test_a_cycle_without_a_volume_is_printed_with_its_flag(demo_run, tmp_path, capsys):
    # found by a sweep: "failed: TypeError: unsupported format string passed to NoneType.__format__" (exit 3),
    # after --save had written reanalysis.json
    folder = edited_copy(demo_run, tmp_path, _no_ambient_before_fill(2))
    code, out, err = analyze(capsys, folder, "--save")
    assert (code, err) == (0, ""), err
    (line,) = [ln for ln in out.splitlines() if ln.startswith("  cycle 2:")]
    assert "V —" in line and "(no volume)" in line and "no volume: pa must be a positive" in line
    saved = json.loads((folder / "reanalysis.json").read_text())
    assert saved["cycles"][1]["volume_cm3"] is None and saved["cycles"][2]["volume_cm3"] is not None


def test_an_impossible_volume_is_not_a_measurement_with_runs_exit_code(demo_run, capsys):
    # found by a sweep: exit 0 with the verdict as the last 'note:', where `run` exits 7 for it and shows it
    # under the number.  Vc 3 cm3 with Vr 8 cm3 make the recorded pressures give about -4 cm3.
    volumes = ["--cell-volume", "3 cm3", "--expansion-volume", "8 cm3", "--u-cell-volume", "0.001 cm3",
               "--u-expansion-volume", "0.001 cm3"]
    code, out, _err = analyze(capsys, demo_run, *volumes)
    assert code == 7
    lines = out.splitlines()
    (at,) = [i for i, ln in enumerate(lines) if ln.startswith("volume: -")]
    assert lines[at + 1].startswith("NOT A MEASUREMENT: the volume -")
    assert not any(ln.startswith("note: NOT A MEASUREMENT") for ln in lines)
    code, out, _err = analyze(capsys, demo_run, *volumes, "--json")
    doc = json.loads(out)
    assert code == 7 and any(f.startswith("NOT A MEASUREMENT") for f in doc["flags"])
    code, _out, err = analyze(capsys, demo_run, *volumes, "--csv")
    assert code == 7 and "NOT A MEASUREMENT" in err
    code, out, _err = analyze(capsys, demo_run)  # the run's own volumes: a result
    assert code == 0 and "NOT A MEASUREMENT" not in out


def _before_cycle(n: int) -> Callable[[Row], Row | None]:
    """The trace cut where cycle n's fill began (the rows of cycle n and later dropped)."""
    def edit(row: Row) -> Row | None:
        return row if row["cycle"] in ("", *map(str, range(n))) else None
    return edit


def test_a_trace_that_keeps_no_cycle_says_there_is_no_volume(demo_run, tmp_path, capsys):
    # found by a sweep: a trace cut after the warm-up cycle printed that cycle's line and stopped: no volume
    # line, no note, flags []
    folder = edited_copy(demo_run, tmp_path, _before_cycle(2))
    code, out, _err = analyze(capsys, folder)
    assert code == 0 and "volume:" not in out
    assert "note: no kept cycle: no volume" in out
    assert "note: this recomputation keeps 0 cycles where the run kept 2" in out
    code, out, _err = analyze(capsys, folder, "--json")
    doc = json.loads(out)
    assert doc["volume_cm3"] is None and [c["kept"] for c in doc["cycles"]] == [False]
    assert any(f.startswith("no kept cycle: no volume") for f in doc["flags"])
    assert (doc["n_kept"], doc["stored_n_kept"]) == (0, 2)


def test_a_result_from_fewer_cycles_than_the_run_kept_says_so(demo_run, tmp_path, capsys):
    # found by a sweep: a trace cut after cycle 2 gave a volume from 1 kept cycle where the stored one is
    # the mean of 2, without a word
    code, out, _err = analyze(capsys, edited_copy(demo_run, tmp_path, _before_cycle(3)))
    assert code == 0 and "volume: " in out
    assert ("note: this recomputation keeps 1 cycle where the run kept 2: its volume is not the mean of the same "
            "cycles as the stored result") in out
    assert "no kept cycle" not in out
    code, out, _err = analyze(capsys, demo_run)  # the whole trace: the same cycles, nothing to say
    assert code == 0 and "note:" not in out


def test_an_interrupted_run_has_no_stored_count_to_compare_with(demo_run, tmp_path, capsys):
    folder = edited_copy(demo_run, tmp_path, _before_cycle(3))
    (folder / "summary.json").unlink()
    code, out, _err = analyze(capsys, folder, "--json")
    doc = json.loads(out)
    assert code == 0 and doc["stored_n_kept"] is None and doc["n_kept"] == 1
    assert not any("where the run kept" in f for f in doc["flags"])


def test_volumes_given_without_their_uncertainties_are_said_to_be_taken_as_exact(demo_run, capsys):
    # found by a sweep: --cell-volume/--expansion-volume alone took u = 0 for both, silently
    volumes = ["--cell-volume", "12 cm3", "--expansion-volume", "8 cm3"]
    code, out, _err = analyze(capsys, demo_run, *volumes)
    lines = out.splitlines()
    (at,) = [i for i, ln in enumerate(lines) if ln.startswith("volume: ")]
    assert code == 0
    assert lines[at + 1] == "note: chamber volumes taken as exact: give --u-cell-volume and --u-expansion-volume"
    code, out, _err = analyze(capsys, demo_run, *volumes, "--json")
    assert "chamber volumes taken as exact: give --u-cell-volume and --u-expansion-volume" in json.loads(out)["flags"]
    code, out, _err = analyze(capsys, demo_run, *volumes, "--u-cell-volume", "0.002 cm3")
    assert "note: expansion volume Vr taken as exact: give --u-expansion-volume" in out
    code, out, _err = analyze(capsys, demo_run, *volumes, "--u-cell-volume", "0.002 cm3", "--u-expansion-volume",
                              "0.002 cm3")
    assert "taken as exact" not in out
    code, out, _err = analyze(capsys, demo_run)  # the run's nominal volumes, each with its 0.5 %
    assert "taken as exact" not in out


def test_a_stored_calibration_without_uncertainties_is_said_to_be_taken_as_exact(demo_run, tmp_path, capsys):
    folder = edited_copy(demo_run, tmp_path, lambda row: row)
    doc = json.loads((folder / "summary.json").read_text())
    doc["calibration"]["cov"] = [[0.0, 0.0], [0.0, 0.0]]
    (folder / "summary.json").write_text(json.dumps(doc))
    code, out, _err = analyze(capsys, folder)
    assert code == 0 and "note: chamber volumes taken as exact: the run's record keeps no uncertainty" in out
