"""The simulator's noise: fresh for every simulated instrument unless pinned, the seed used recorded
with each run, and a run replayed exactly from its recorded seed; calibration spheres placed with
volumes drawn within their certificates."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.jobs.calibration import SimCellLoader, parse_sphere
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import load_sim_config, shipped_configs


def _readings(inst, n: int = 50) -> list[float]:
    out = []
    for _ in range(n):
        inst.clock.sleep(inst.sample_period)
        out.append(inst.pressure.read().value)
    return out


def test_every_simulated_instrument_draws_fresh_noise_unless_pinned(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("PYCNOCTL_SIM_SEED", raising=False)
    noisy = load_sim_config(shipped_configs()["noisy"])
    assert noisy.seed is None  # no shipped config pins its noise
    a, b = build_sim_instrument(noisy), build_sim_instrument(noisy)
    assert a.extras["sim"].seed != b.extras["sim"].seed
    assert _readings(a) != _readings(b)
    c, d = build_sim_instrument(noisy, seed=42), build_sim_instrument(noisy, seed=42)
    assert c.extras["sim"].seed == 42 and _readings(c) == _readings(d)


def test_a_run_records_its_seed_and_replays_from_it(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                    capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.delenv("PYCNOCTL_SIM_SEED", raising=False)
    noisy = str(Path(__file__).resolve().parents[1] / "sim" / "configs" / "noisy.yaml")
    args = ["run", "quick-demo", "--sim", noisy, "--quiet", "--json", "--data", str(tmp_path)]
    runs = []
    for extra in ([], [], None):
        if extra is None:  # the replay: the first run's own seed
            extra = ["--seed", str(runs[0]["instrument"]["sim_seed"])]
        capsys.readouterr()
        assert cli.main(args + extra) in (0, 3, 4)
        rid = json.loads(capsys.readouterr().out)["run_id"]
        runs.append(json.loads((tmp_path / "runs" / rid / "summary.json").read_text()))
    seeds = [r["instrument"]["sim_seed"] for r in runs]
    assert seeds[0] != seeds[1] and seeds[2] == seeds[0]
    vols = [r["results"]["volume_cm3"] for r in runs]
    assert vols[0] != vols[1]  # a real repeatability: two realisations differ
    assert vols[2] == vols[0]  # and the recorded seed replays the run bit for bit
    assert cli.main(["run", "quick-demo", "--seed", "3", "--instrument", "x.yaml", "--data", str(tmp_path)]) == 2


def test_calibration_spheres_are_placed_within_their_certificates() -> None:
    """Over many loaders the placed volumes scatter about the certificate value with its standard
    uncertainty (a normal draw: mean within 4 standard errors, SD within 10 % for 400 draws)."""
    sphere = parse_sphere("D=25.400 mm,u=0.002 mm", "s1")
    placed = []
    for seed in range(400):
        loader = SimCellLoader(None, seed=seed)
        loader.load(1, sphere).close()
        placed.append(loader.placed[sphere.label])
    x = np.array(placed)
    assert abs(x.mean() - sphere.volume) < 4 * sphere.u_volume / np.sqrt(x.size)
    assert x.std(ddof=1) == pytest.approx(sphere.u_volume, rel=0.1)
    again = SimCellLoader(None, seed=5)
    again.load(1, sphere).close()
    assert again.placed[sphere.label] == placed[5]  # pinned: the same draw
    mixed = SimCellLoader(None, seed=5, actual={sphere.label: 8.0e-6})
    mixed.load(1, sphere).close()
    assert mixed.placed[sphere.label] == 8.0e-6  # a known placement wins
