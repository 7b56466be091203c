"""A coarse, quiet pressure gauge: its rounding is an error no window averages down, so it is budgeted.

Reference: a reading rounded to steps of q carries an error uniform on +/- q/2, standard uncertainty
q / sqrt(12) (GUM, JCGM 100:2008, F.2.2.1); with noise much below q a steady pressure reads the same
step every sample, so the error is the same in every sample of a settle (common practice: dither, noise
of at least q/2, is what makes averaging below the step possible)."""

from __future__ import annotations

import json
import math

import pytest
import yaml

from pycnoctl.controller.cli.main import main
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import config_from_dict, shipped_configs


def _clean(**pressure: object) -> dict:
    data = yaml.safe_load(shipped_configs()["clean"].read_text(encoding="utf-8"))
    data["instruments"]["pressure"].update(pressure)
    return data


@pytest.mark.parametrize(("noise", "resolution", "steps"), [("0 Pa", "500 Pa", 500 / math.sqrt(12)),
                                                            ("300 Pa", "500 Pa", 0.0), ("0 Pa", "0 Pa", 0.0)])
def test_the_simulated_datasheet_states_the_rounding_a_quiet_gauge_cannot_average(noise, resolution, steps):
    inst = build_sim_instrument(config_from_dict(_clean(noise=noise, resolution=resolution)))
    assert inst.pressure_u_linearity == pytest.approx(steps)
    inst.close()


def test_a_calibrated_coarse_gauge_states_a_u_that_covers_its_error(tmp_path, capsys):
    """Found by a sweep: a noise-free gauge with 3 kPa steps, read every 0.5 s, calibrated with one sphere and
    then measured 5.236 cm3 for 5 with U = 0.0025 cm3 (96 U off, exit 0)."""
    data = _clean(noise="0 Pa", resolution="3000 Pa")
    data["sample_period"] = "0.5 s"
    sim = tmp_path / "coarse.yaml"
    sim.write_text(yaml.safe_dump(data), encoding="utf-8")
    store = str(tmp_path / "d")
    assert main(["calibrate", "--sim", str(sim), "--seed", "1", "--data", store, "--sphere",
                 "V=8.5802 cm^3,u=0.0004 cm^3", "--expansion-volume", "small", "--yes"]) == 0
    capsys.readouterr()
    main(["run", "grain-volume", "--sim", str(sim), "--seed", "2", "--data", store, "--json", "--quiet"])
    out = json.loads(capsys.readouterr().out)
    assert out["status"] == "completed" and out["calibration"]["record"]  # computed with the calibration
    assert abs(out["volume_cm3"] - 5.0) <= out["volume_u_cm3"]  # the simulator's specimen is 5 cm3
