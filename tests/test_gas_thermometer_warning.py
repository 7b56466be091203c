"""A thermometer that reads the gas rather than the wall is named in the run's warnings, with what it
costs: the settles follow the wall by a line through the last two minutes of readings, and a probe in
the gas puts each fill's heating into that line (grain-volume on the clean demo bench, seed 1: 3223
simulated seconds with it, 277 with the thermometer on the wall; the accuracy bench's 8 s cell: 57
simulated minutes a specimen against 21, `python bench/bench_accuracy.py --edges --only he-gas-thermo`).
A wall thermometer never draws it, even a noisy one in a lab warming 1 K/h (invented
instruments, chosen at the edges a wall thermometer reaches: 0.3 K of noise is a poor sensor, 1 K/h a
lab in the sun)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from pycnoctl.controller.cli import main as cli
from pycnoctl.sim.config import shipped_configs

CLEAN = Path(shipped_configs()["clean"]).read_text()
WALL = "thermometer: {at: wall, update_rate: 10 Hz}"


def _warnings(tmp_path: Path, capsys: pytest.CaptureFixture[str], thermometer: str, lab: str = "") -> list[str]:
    text = CLEAN.replace(WALL, f"thermometer: {thermometer}")
    text = text.replace("cell:   {volume: 12 cm^3, thermal_tau: 2 s}", "cell:   {volume: 12 cm^3, thermal_tau: 8 s}")
    if lab:
        text = text.replace("  temperature: 22 degC\n", f"  temperature: 22 degC\n{lab}")
    path = tmp_path / "sim.yaml"
    path.write_text(text)
    capsys.readouterr()
    assert cli.main(["run", "quick-demo", "--sim", str(path), "--seed", "2", "--json",
                     "--data", str(tmp_path / "d")]) == 0
    return [w for w in json.loads(capsys.readouterr().out)["warnings"] if "thermometer" in w]


def test_a_thermometer_in_the_gas_is_named_with_its_cost(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    [warning] = _warnings(tmp_path, capsys, "{at: cell, update_rate: 10 Hz, noise: 0.01 K}")
    assert "reads the gas, not the wall" in warning and "several times as long" in warning


@pytest.mark.parametrize(("thermometer", "lab"), [
    ("{at: wall, update_rate: 10 Hz, noise: 0.01 K}", ""),
    ("{at: wall, update_rate: 10 Hz, noise: 0.3 K}", "  temperature_drift: 1 K/h\n"),
], ids=["quiet", "noisy-in-a-warming-lab"])
def test_a_wall_thermometer_draws_no_such_warning(thermometer: str, lab: str, tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    assert _warnings(tmp_path, capsys, thermometer, lab) == []
