"""A report of a run whose stored volumes are not finite numbers: drawn without them, and said so.

Found by a sweep: `report` of a run whose summary.json holds a NaN volume ended in
"failed: ValueError: Axis limits cannot be NaN or Inf" (matplotlib), and no report was written.
"""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.record.report import not_drawn


@pytest.fixture(scope="module")
def nan_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A finished quick-demo run whose stored result and cycle 2 have a NaN volume, cycle 3 a NaN u."""
    data = tmp_path_factory.mktemp("data")
    assert main(["run", "quick-demo", "--sim", "--data", str(data), "--quiet", "--json"]) == 0
    (good,) = (data / "runs").iterdir()
    folder = data / "copies" / good.name
    shutil.copytree(good, folder)
    doc = json.loads((folder / "summary.json").read_text())
    doc["results"]["volume_cm3"] = math.nan
    doc["results"]["cycles"][1]["volume_cm3"] = math.nan
    doc["results"]["cycles"][2]["u_volume_cm3"] = math.inf
    (folder / "summary.json").write_text(json.dumps(doc))  # NaN as JSON's NaN, as Python writes it
    return folder


EXPECTED = ["the run's volume is not a finite number (nan): it is not drawn",
            "cycle 2: its volume is not a finite number (nan): it is not drawn",
            "cycle 3: its u is not a finite number (inf): drawn without its error bar"]


def test_not_drawn_names_each_value_that_is_not_a_finite_number(nan_run):
    assert not_drawn(json.loads((nan_run / "summary.json").read_text())["results"]) == EXPECTED
    whole = json.loads((nan_run.parent.parent / "runs" / nan_run.name / "summary.json").read_text())
    assert not_drawn(whole["results"]) == []


@pytest.mark.parametrize("suffix", [".html", ".pdf"])
def test_the_report_is_written_and_says_what_it_left_out(nan_run, tmp_path, capsys, suffix):
    out = tmp_path / f"r{suffix}"
    assert main(["report", str(nan_run), "--out", str(out), "--data", str(nan_run.parent.parent)]) == 0
    assert capsys.readouterr().err == ""
    assert out.stat().st_size > 0 and out.with_suffix(".png").stat().st_size > 0
    if suffix == ".html":
        text = out.read_text().replace("&#39;", "'")
        for line in EXPECTED:
            assert f"NOT DRAWN: {line}" in text
