"""A result no specimen can have is told as such: a volume below zero or above the sample cell's beyond
its U (the chamber volumes or the readings are wrong) ends `run` with exit 7 and "NOT A MEASUREMENT"
wherever the result appears; an empty cell, which measures zero within its noise, is not called
impossible; a bulk volume smaller than the grain volume is warned about instead of printing a negative
porosity as if it were one; and what no specimen can be (a negative mass uncertainty, a mass in the
wrong unit) is refused by the command line as by the daemon.

References: that a skeletal volume lies between zero and the sample cell's volume, and a porosity
1 - Vs/Vb between 0 and 1, is the definition of the quantities (common practice); the simulator's
truth is the reference for the volumes."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from pycnoctl.controller.cli import main as cli
from pycnoctl.sim.config import shipped_configs

CLEAN = Path(shipped_configs()["clean"]).read_text()  # 12 cm3 cell, a 5 cm3 solid


def _sim(tmp_path: Path, name: str, text: str) -> str:
    path = tmp_path / f"{name}.yaml"
    path.write_text(text)
    return str(path)


def _run(tmp_path: Path, sim: str, capsys: pytest.CaptureFixture[str], *extra: str) -> tuple[int, dict]:
    capsys.readouterr()
    code = cli.main(["run", "quick-demo", "--sim", sim, "--seed", "3", "--quiet", "--json",
                     "--data", str(tmp_path / "data"), *extra])
    return code, json.loads(capsys.readouterr().out)


def test_outside_cell_allows_the_volume_its_uncertainty_at_both_ends() -> None:
    from pycnoctl.controller.maths.results import outside_cell

    cell = 12e-6
    assert outside_cell(-0.05e-6, 0.1e-6, cell) is None  # an empty cell, about zero
    assert outside_cell(12.05e-6, 0.1e-6, cell) is None  # a full one
    assert "below zero" in (outside_cell(-0.15e-6, 0.1e-6, cell) or "")
    assert "exceeds the sample cell" in (outside_cell(12.15e-6, 0.1e-6, cell) or "")
    assert outside_cell(math.nan, 0.1e-6, cell) is None  # no volume: said elsewhere


def test_a_negative_result_is_not_a_measurement_and_exits_7(tmp_path: Path,
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    # The instrument believes its cell is 6 cm3 (the truth is 12): every cycle comes out near -1 cm3.
    # Before, the run ended "completed" with exit 0 and the negative volume as its result.
    sim = _sim(tmp_path, "wrong", CLEAN + "nominal:\n  cell: 6 cm^3\n  u: 0.01\n")
    code, summary = _run(tmp_path, sim, capsys)
    assert code == 7
    assert summary["status"] == "completed"
    assert summary["volume_cm3"] < 0
    assert "below zero" in summary["impossible"]
    assert any(w.startswith("NOT A MEASUREMENT") for w in summary["warnings"])
    capsys.readouterr()
    assert cli.main(["show", summary["run_id"], "--data", str(tmp_path / "data")]) == 0
    assert "NOT A MEASUREMENT" in capsys.readouterr().out
    assert cli.main(["runs", "--data", str(tmp_path / "data"), "--csv"]) == 0  # the catalog row's message
    assert "NOT A MEASUREMENT" in capsys.readouterr().out
    assert cli.main(["runs", "--data", str(tmp_path / "data")]) == 0  # and the table, even at 80 columns
    assert "not a measurement" in " ".join(capsys.readouterr().out.split())


def test_an_empty_cell_measures_zero_without_being_called_impossible(tmp_path: Path,
                                                                    capsys: pytest.CaptureFixture[str]) -> None:
    sim = _sim(tmp_path, "empty", CLEAN.replace("solid_volume: 5 cm^3", "solid_volume: 0 cm^3"))
    code, summary = _run(tmp_path, sim, capsys)
    assert code == 0
    assert abs(summary["volume_cm3"]) < summary["volume_u_cm3"]
    assert summary["impossible"] is None
    assert not any("outside the cell" in f for c in summary["cycles"] for f in c["flags"])


def test_a_bulk_volume_below_the_grain_volume_is_warned_not_shown_as_a_porosity(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, summary = _run(tmp_path, "", capsys, "--bulk-volume", "4 cm3", "--u-bulk-volume", "0.01 cm3")
    assert code == 0  # the grain volume itself is a measurement
    assert summary["porosity"] < 0
    [warning] = [w for w in summary["warnings"] if "porosity" in w]
    assert "below zero beyond its U" in warning and "bulk volume 4 cm3" in warning
    code, summary = _run(tmp_path, "", capsys, "--bulk-volume", "6 cm3", "--u-bulk-volume", "0.01 cm3")
    assert 0 < summary["porosity"] < 1
    assert not [w for w in summary["warnings"] if "porosity" in w]


@pytest.mark.parametrize(("args", "field"), [
    (["--u-mass=-0.1 mg", "--mass", "19 g"], "--u-mass"),  # was taken by its magnitude
    (["--mass", "19 g", "--u-mass", "12 g"], "--u-mass"),
    (["--mass", "19 kg"], "--mass"),  # a wrong unit: the daemon refused it, the command line did not
    (["--bulk-volume", "3 m3"], "--bulk-volume"),
])
def test_the_command_line_refuses_what_the_daemon_refuses_about_the_specimen(
        args: list[str], field: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["run", "quick-demo", "--sim", "--quiet", "--data", str(tmp_path), *args]) == 2
    assert capsys.readouterr().err.startswith(f"pycnoctl run: error: {field}:")
    assert not (tmp_path / "runs").exists()


def test_a_result_that_is_not_a_measurement_stays_out_of_the_sample_mean_and_analyze_says_so(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # found by a sweep: the sample-set report averaged a -5.5 cm3 run into its sample's mean (-0.25 cm3),
    # and analyze of such a run with a mass ended in "failed: ValueError" (a density of a negative volume)
    data = str(tmp_path / "data")
    assert cli.main(["run", "quick-demo", "--sim", "--seed", "3", "--quiet", "--sample", "MIX", "--mass", "12 g",
                     "--data", data]) == 0
    wrong = _sim(tmp_path, "wrong", CLEAN + "nominal:\n  cell: 6 cm^3\n  u: 0.01\n")
    code, summary = _run(tmp_path, wrong, capsys, "--sample", "MIX", "--mass", "12 g")
    assert code == 7
    from pycnoctl.controller.record.catalog import Catalog
    from pycnoctl.controller.record.report import sample_set

    with Catalog(tmp_path / "data" / "catalog.sqlite") as catalog:
        [mix] = sample_set(catalog, prefix="MIX")
    assert mix.n == 1 and mix.left_out == [summary["run_id"]]
    assert mix.as_dict()["mean_volume_cm3"] == pytest.approx(5.0, rel=1e-3)
    capsys.readouterr()
    assert cli.main(["analyze", summary["run_id"], "--data", data, "--json"]) == 7  # as `run` exits for it
    out = json.loads(capsys.readouterr().out)
    assert any(f.startswith("NOT A MEASUREMENT") for f in out["flags"]) and "density_g_cm3" not in out
