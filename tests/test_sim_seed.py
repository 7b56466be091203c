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


def test_a_bowed_transducer_reads_off_the_line_and_its_instrument_says_by_how_much() -> None:
    """Terminal-based non-linearity: zero error at the range's ends, the stated share of the span at
    mid-range; the simulated instrument states it as a rectangular bound d / sqrt(3) (GUM 4.3.7)."""
    from pycnoctl.sim.testing import make

    d_rel = 0.001  # 0.1 % of a 3.5 bar span: 350 Pa at mid-range
    inst = build_sim_instrument(make({"instruments": {"pressure": {"nonlinearity": d_rel}}}), seed=1)
    span = 3.5e5
    assert inst.pressure_u_linearity == pytest.approx(d_rel * span / np.sqrt(3.0))
    linear = build_sim_instrument(make(), seed=1)
    assert linear.pressure_u_linearity == 0.0
    # the bow itself, through the bench's own read path: hold the cell at ambient (vent open) -> 0 error
    assert abs(inst.pressure.read().value - linear.pressure.read().value) < 1e-6
    # filled alike for the same time, both cells hold the same gas; the bowed gauge reads the bow more
    for b in (inst, linear):
        b.valves.set_valves({"vent": False, "exp_small": False, "exp_large": False})
        b.valves.set_valves({"inlet": True})
        b.clock.sleep(2.0)
        b.valves.set_valves({"inlet": False})
        b.clock.sleep(1.0)
    x = linear.pressure.read().value  # the linear gauge reads the truth here (noise-free bench)
    assert 0.2 * span < x < 0.8 * span, x
    u = x / span
    assert inst.pressure.read().value - x == pytest.approx(4 * d_rel * span * u * (1 - u), rel=1e-6)


@pytest.mark.parametrize("seed", ["-1", "1.5", "x"])
def test_a_seed_that_is_not_a_whole_number_from_0_is_an_input_error(seed: str, tmp_path: Path,
                                                                    capsys: pytest.CaptureFixture[str]) -> None:
    # numpy's generator takes seeds from 0 up; a negative one ended "failed: ValueError" (exit 3)
    with pytest.raises(SystemExit) as exc:
        cli.main(["run", "grain-volume", "--sim", "--seed", seed, "--data", str(tmp_path), "--quiet"])
    assert exc.value.code == 2
    assert "--seed" in capsys.readouterr().err
    assert not (tmp_path / "runs").exists()


def test_a_negative_seed_in_a_simulator_config_is_refused_at_its_line(tmp_path: Path) -> None:
    from pycnoctl.controller.domain.yamlio import ConfigError

    path = tmp_path / "sim.yaml"
    path.write_text(Path(shipped_configs()["clean"]).read_text() + "seed: -3\n")
    with pytest.raises(ConfigError) as exc:
        load_sim_config(path)
    [problem] = exc.value.problems
    assert str(problem).startswith(f"{path}:{len(path.read_text().splitlines())}:") and "seed" in str(problem)
