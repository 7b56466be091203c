"""Live and replay are one measurement: on every shipped sequence and every shipped simulator config,
``pycnoctl analyze`` of a run's record gives the live result bit for bit (the same CycleMeasurer is fed
the same rows). The matrix is discovered from the shipped folders, so a new sequence or config is
covered without touching this file. About 15 s for the 20 runs on the reference machine."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main

ROOT = Path(__file__).resolve().parent.parent
SEQUENCES = sorted((ROOT / "sequences").glob("*.yaml"))
CONFIGS = sorted((ROOT / "sim" / "configs").glob("*.yaml"))
CYCLE_KEYS = ("index", "baseline_pa", "ambient_pa", "p1_gauge_pa", "p2_gauge_pa", "u_p1_pa", "u_p2_pa",
              "t1_k", "t2_k", "ta_k", "settle1_s", "settle2_s", "drift1_pa_s", "drift2_pa_s",
              "volume_m3", "u_volume_m3", "kept", "flags")


def _json(capsys: pytest.CaptureFixture[str], argv: list[str]) -> dict:
    main(argv)  # the exit code follows the run (a fault, a failed leak check): the record is what counts
    return json.loads(capsys.readouterr().out)


def _sphere_run(sequence: Path, config: Path, data: Path) -> dict:
    """A calibration sequence is not a run of its own (`run` refuses it): one sphere's run, as `calibrate`
    makes it (the same prepare and execute), on the simulator's own specimen."""
    from pycnoctl.controller.jobs.measurement import RunRequest, execute, jsonable, prepare
    from pycnoctl.controller.record.catalog import Catalog
    from pycnoctl.controller.run.control import Controller
    from pycnoctl.drivers.simulated import build_sim_instrument

    inst = build_sim_instrument(config)
    with Catalog(data / "catalog.sqlite") as catalog:
        summary = execute(prepare(RunRequest(sequence, sample_id="X-1", mass=19.62e-3), inst), Controller(inst),
                          root=data / "runs", catalog=catalog)
    inst.close()
    return json.loads(json.dumps(jsonable(summary)))


def test_the_matrix_is_the_shipped_one() -> None:
    assert len(SEQUENCES) >= 5 and len(CONFIGS) >= 4


@pytest.mark.parametrize("config", CONFIGS, ids=lambda p: p.stem)
@pytest.mark.parametrize("sequence", SEQUENCES, ids=lambda p: p.stem)
def test_analyze_of_the_record_is_the_live_result_bit_for_bit(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                                sequence: Path, config: Path) -> None:
    if "kind: calibrate" in sequence.read_text(encoding="utf-8"):
        live = _sphere_run(sequence, config, tmp_path)
    else:
        live = _json(capsys, ["run", str(sequence), "--sim", str(config), "--data", str(tmp_path), "--json",
                              "--quiet", "--sample", "X-1", "--mass", "19.62 g"])
    replay = _json(capsys, ["analyze", live["run_id"], "--data", str(tmp_path), "--json"])
    assert replay["volume_cm3"] == live["volume_cm3"]
    assert replay["volume_u_cm3"] == live["volume_u_cm3"]
    assert replay.get("density_g_cm3") == live["density_g_cm3"]
    assert len(replay["cycles"]) == len(live["cycles"])
    for mine, theirs in zip(replay["cycles"], live["cycles"], strict=True):
        assert {k: mine[k] for k in CYCLE_KEYS} == {k: theirs[k] for k in CYCLE_KEYS}, mine["index"]
    if live["status"] == "completed" and live["sequence"]["kind"] in ("measure", "calibrate"):
        assert live["cycles"] and live["volume_cm3"] is not None  # a completed measurement compared something
