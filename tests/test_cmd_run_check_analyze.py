"""The run, check and analyze verbs end to end, through the CLI entry point and as processes."""

from __future__ import annotations

import csv
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.maths.volume import expansion_ratio
from pycnoctl.controller.record.runfolder import load_run
from pycnoctl.controller.run.sequence import resolve_sequence
from pycnoctl.sim.config import shipped_configs

PYCNOCTL = [sys.executable, "-m", "pycnoctl.controller.cli.main"]


def run_json(capsys, *args: str) -> tuple[int, dict]:
    code = main(["run", *args, "--json"])
    return code, json.loads(capsys.readouterr().out)


def test_run_json_has_the_documented_fields(tmp_path, capsys):
    code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path), "--mass", "19.62 g",
                         "--sample", "AL-0417")
    assert code == 0 and out["status"] == "completed"
    for key in ("volume_cm3", "volume_u_cm3", "density_g_cm3", "cycles", "fault"):
        assert key in out
    assert out["fault"] is None
    assert out["density_g_cm3"] == pytest.approx(19.62 / out["volume_cm3"], rel=1e-9)
    assert {"p1_gauge_pa", "p2_gauge_pa", "volume_cm3"} <= set(out["cycles"][0])
    assert (tmp_path / "runs" / out["run_id"] / "trace.csv").exists()


def test_run_exit_code_on_fault(tmp_path, capsys):
    code, out = run_json(capsys, "quick-demo", "--sim", str(shipped_configs()["regulator_failure"]),
                         "--data", str(tmp_path))
    assert code == 3 and out["status"] == "fault"
    assert out["fault"]["kind"] == "rise_rate" and out["volume_cm3"] is None


def test_run_refuses_a_bad_sequence_with_positions_and_touches_nothing(tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text("format: pycnoctl-sequence/1\nname: x\nkind: measure\nfill:\n  target: 1.3 kg\n"
                   "  timeout: 30 s\nexpand: {volume: small}\ncycles: {count: 3, discard: 5}\n")
    code = main(["run", str(bad), "--sim", "--data", str(tmp_path / "data")])
    err = capsys.readouterr().err
    assert code == 2
    lines = [ln for ln in err.splitlines() if ln.startswith(str(bad))]
    assert any(":5:" in ln and "pressure" in ln for ln in lines)  # '1.3 kg' at line 5
    assert any(":8:" in ln for ln in lines)  # discard >= count on line 8
    assert not (tmp_path / "data" / "runs").exists()


def test_check_reports_validity_and_expected_duration(capsys):
    assert main(["check", "quick-demo", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["dry_run"]["status"] == "completed"
    assert 60 < out["dry_run"]["expected_duration_s"] < 900
    assert out["dry_run"]["volume_cm3"] == pytest.approx(5.0, rel=2e-3)


def test_check_dry_run_fault_and_static_only(capsys):
    assert main(["check", "grain-volume", "--sim", str(shipped_configs()["leaky"])]) == 3
    assert "settle_timeout" in capsys.readouterr().out
    assert main(["check", "grain-volume", "--no-dry-run"]) == 0
    assert "dry run" not in capsys.readouterr().out


@pytest.mark.parametrize(("roles", "says"), [
    ("{inlet: inlet, vent: vent, expansion: {small: exp_large, large: exp_small}}", "9.1997"),
    ("{inlet: inlet, vent: vent, expansion: {small: exp_small}, other: [exp_large]}", "NOT A MEASUREMENT"),
])
def test_check_fails_a_dry_run_that_misses_the_simulated_specimen(tmp_path, capsys, roles, says):
    """Found by a sweep: a simulated instrument whose expansion valves were swapped against its simulator's
    passed check with 'simulated result: 9.1997 cm3' for the simulator's 5 cm3 specimen, and one that listed
    an expansion valve under 'other' (open in every state) passed while its own dry run said NOT A
    MEASUREMENT.  The simulator knows its specimen: a result beyond its U from it is exit 7."""
    cfg = tmp_path / "inst.yaml"
    cfg.write_text(Path(__file__).resolve().parents[1].joinpath("drivers", "instruments", "simulated.yaml")
                   .read_text() + f"valve_roles: {roles}\n")
    assert main(["check", "quick-demo", "--instrument", str(cfg)]) == 7
    out = capsys.readouterr().out
    assert says in out and "disagree with the simulator it runs on" in out
    assert main(["check", "quick-demo", "--sim"]) == 0  # the consistent one passes


def test_check_of_a_hardware_config_says_when_the_sequence_opens_a_forbidden_pair(tmp_path, capsys):
    """Found by a sweep: 'forbidden: [[inlet, small]]' passed check (its dry run is on the built-in simulator,
    whose valves have other names), and every real run faulted at its first purge pulse, which opens the
    inlet with the run's expansion valve.  The dry run's valve sets are named again by role."""
    root = Path(__file__).resolve().parents[1]
    text = (root / "drivers" / "instruments" / "usb-relay-serial-gauge.yaml").read_text()
    assert "  - [inlet, vent]\n" in text
    cfg = tmp_path / "lab.yaml"
    cfg.write_text(text.replace("  - [inlet, vent]\n", "  - [inlet, vent]\n  - [inlet, small]\n"))
    assert main(["check", "quick-demo", "--instrument", str(cfg), "--json"]) == 3
    out = json.loads(capsys.readouterr().out)
    assert out["dry_run"]["forbidden"] == ["the sequence opens inlet and small together (purge_fill), which "
                                           "forbidden: lists"]
    cfg.write_text(text.replace("  - [inlet, vent]\n", "  - [inlet, vent]\n  - [inlet, large]\n"))
    assert main(["check", "quick-demo", "--instrument", str(cfg)]) == 0  # the run uses 'small': no clash


def test_check_against_a_hardware_config_opens_no_port(capsys):
    root = Path(__file__).resolve().parents[1]
    cfg = root / "drivers" / "instruments" / "usb-relay-serial-gauge.yaml"
    assert main(["check", "quick-demo", "--instrument", str(cfg), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["dry_run"]["status"] == "completed"


def test_analyze_reproduces_the_stored_run_and_applies_a_new_calibration(tmp_path, capsys):
    _code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path))
    rid = out["run_id"]
    assert main(["analyze", rid, "--data", str(tmp_path), "--json"]) == 0
    re = json.loads(capsys.readouterr().out)
    assert re["volume_cm3"] == out["volume_cm3"]  # same samples, same rules: the same number
    assert [c["volume_cm3"] for c in re["cycles"]] == [c["volume_cm3"] for c in out["cycles"]]
    # a newer calibration: Vs = Vc - Vr * y with the recorded pressures (methods: working equation)
    assert main(["analyze", rid, "--data", str(tmp_path), "--json", "--cell-volume", "12.02 cm^3",
                 "--expansion-volume", "8.01 cm^3"]) == 0
    newer = json.loads(capsys.readouterr().out)
    for c_new, c_old in zip(newer["cycles"], out["cycles"], strict=True):
        y = expansion_ratio(c_old["ambient_pa"] + c_old["p1_gauge_pa"], c_old["ambient_pa"] + c_old["p2_gauge_pa"],
                            c_old["ambient_pa"], gas="helium", t1=c_old["t1_k"], t2=c_old["t2_k"], ta=c_old["ta_k"])
        assert c_new["volume_cm3"] == pytest.approx(12.02 - 8.01 * y, rel=1e-9)
    assert main(["analyze", "R20990101T000000Z-000000", "--data", str(tmp_path)]) == 2


def _imported(tmp_path: Path, capsys, *extra: str, volume: str = "small", sim: str | None = None) -> str:
    args = ["calibrations", "import", "--sim", *([sim] if sim else []), "--expansion-volume", volume,
            "--cell-volume", "11.98 cm3", "--u-cell-volume", "0.002 cm3",
            "--volume", "8.02 cm3" if volume == "small" else "20.05 cm3",
            "--u-volume", "0.002 cm3", "--note", "volumes from elsewhere", "--data", str(tmp_path), *extra]
    assert main(args) == 0
    capsys.readouterr()
    assert main(["calibrations", "list", "--all", "--json", "--data", str(tmp_path)]) == 0
    return json.loads(capsys.readouterr().out)[0]["id"]


@pytest.mark.parametrize("case", ["another instrument", "another volume", "another gas", "retired"])
def test_analyze_refuses_a_calibration_the_run_itself_would_refuse(tmp_path, capsys, case):
    """Found by a sweep: 'analyze --calibration ID' took a calibration of another instrument, another
    expansion volume or a retired one, and stated 4.325 cm3 +/- 0.008 for a 5.000 specimen (exit 0); a run
    refuses all of these.  The run's own calibration, retired since, still re-analyses it."""
    code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path), "--expansion-volume", "small")
    assert code == 0
    if case == "another instrument":
        cal = _imported(tmp_path, capsys, sim=str(shipped_configs()["noisy"]))
        want = "was made on instrument"
    elif case == "another volume":
        cal = _imported(tmp_path, capsys, volume="large")
        want = "is of expansion volume 'large', and this run expanded into 'small'"
    elif case == "another gas":
        cal = _imported(tmp_path, capsys, "--gas", "nitrogen")
        want = "was made in nitrogen, and this run is in helium"
    else:
        cal = _imported(tmp_path, capsys)
        assert main(["calibrations", "retire", cal, "--reason", "valve replaced", "--data", str(tmp_path)]) == 0
        want = "is retired"
    capsys.readouterr()
    assert main(["analyze", out["run_id"], "--calibration", cal, "--data", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert f"calibration {cal} {want}" in err, err


def test_analyze_takes_the_retired_calibration_the_run_computed_with(tmp_path, capsys):
    out, _folder = _calibrated_run(tmp_path, capsys)
    cal = out["calibration"]["record_id"]
    assert main(["calibrations", "retire", cal, "--reason", "superseded", "--data", str(tmp_path)]) == 0
    capsys.readouterr()
    assert main(["analyze", out["run_id"], "--calibration", cal, "--data", str(tmp_path), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["volume_cm3"] == pytest.approx(out["volume_cm3"], rel=1e-12)


def test_re_analysis_under_a_sequence_that_stops_at_an_unsettled_pressure_keeps_no_such_cycle(tmp_path, capsys):
    """Found by a sweep: 'analyze R --sequence grain-volume' of a quick-demo run (4 s windows, settles cut at
    30 s) stated 5.00081 +/- 0.00351 cm3 from three cycles flagged unsettled_p1 unsettled_p2, kept; the
    grain-volume sequence (on_timeout: fault) would have stopped the run at the first of them."""
    from pycnoctl.controller.record.replay import NOT_SETTLED_HERE

    _code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path))
    assert main(["analyze", out["run_id"], "--data", str(tmp_path), "--sequence", "grain-volume", "--json"]) == 0
    re = json.loads(capsys.readouterr().out)
    unsettled = [c for c in re["cycles"] if "unsettled_p1" in c["flags"] or "unsettled_p2" in c["flags"]]
    assert unsettled and all(NOT_SETTLED_HERE in c["flags"] and not c["kept"] for c in unsettled)
    assert re["volume_cm3"] is None or len(unsettled) < len(re["cycles"])
    # its own sequence (on_timeout: accept) keeps what the run kept
    assert main(["analyze", out["run_id"], "--data", str(tmp_path), "--json"]) == 0
    own = json.loads(capsys.readouterr().out)
    assert [c["kept"] for c in own["cycles"]] == [c["kept"] for c in out["cycles"]]


@pytest.mark.parametrize(("extra", "want"), [
    (["--calibration", "C20990101T000000Z-000000", "--cell-volume", "12 cm3", "--expansion-volume", "8 cm3"],
     "not both"),
    (["--u-cell-volume", "0.002 cm3"], "--u-cell-volume go with --cell-volume and --expansion-volume"),
    (["--cell-volume", "12 cm3", "--expansion-volume", "8 cm3", "--u-cell-volume", "1000 cm3"],
     "is not an uncertainty of a 12 cm3 volume"),
])
def test_analyze_refuses_volume_options_it_would_ignore_or_that_cannot_be(tmp_path, capsys, extra, want):
    # found by a sweep: volumes beside --calibration and an uncertainty without its volume were silently
    # ignored, and --u-cell-volume 1000 cm3 on a 12 cm3 cell was taken (calibrations import refuses it)
    _code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path))
    assert main(["analyze", out["run_id"], "--data", str(tmp_path), *extra]) == 2
    assert want in capsys.readouterr().err


def test_check_of_simulated_valves_with_a_real_meter_takes_limits_and_volumes_from_the_simulator(tmp_path, capsys):
    """Found by a sweep: a config of simulated valves and a VISA meter (here on a pyvisa-sim file) gave no
    limits or chambers of its own, as simulated valves allow, and check failed with 'max_pressure must be
    a positive pressure in Pa, got 0.0' (exit 3); no port is opened by the static check."""
    from importlib.resources import files

    meter = f"{files('pycnoctl.drivers') / 'visa' / 'loop_meter.yaml'}@sim"
    cfg = tmp_path / "station.yaml"
    cfg.write_text(f"""name: teaching-station
valves: {{kind: sim}}
pressure:
  kind: visa_meter
  resource: TCPIP::127.0.0.1::INSTR
  backend: "{meter}"
  timeout: 1 s
  query: "MEAS:CURR:DC?"
  scale: {{signal_low: 4 mA, signal_high: 20 mA, pressure_low: 0 bar, pressure_high: 3.5 bar}}
  reference: gauge
thermometer: {{kind: sim}}
barometer: {{kind: sim}}
sample_period: 0.2 s
""", encoding="utf-8")
    assert main(["check", "quick-demo", "--instrument", str(cfg), "--no-dry-run", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["problems"] == []


#: what a recomputation takes of the instrument (the arguments of record/replay.py's reanalyze)
INSTRUMENT_FACTS = ("gas", "pressure_is_gauge", "pressure_u", "pressure_u_linearity", "temperature_u", "barometer",
                    "barometer_u", "ambient_drift_rate", "thermometer")


def _calibrated_run(tmp_path: Path, capsys) -> tuple[dict, Path]:
    """A finished quick-demo run that computed with a calibration record from the catalog."""
    assert main(["calibrations", "import", "--sim", "--expansion-volume", "small", "--cell-volume", "12.003 cm3",
                 "--u-cell-volume", "0.002 cm3", "--volume", "8.004 cm3", "--u-volume", "0.002 cm3",
                 "--note", "test volumes", "--data", str(tmp_path)]) == 0
    capsys.readouterr()
    code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path), "--expansion-volume", "small",
                         "--mass", "19.62 g")
    assert code == 0 and out["calibration"]["record_id"]
    return out, tmp_path / "runs" / out["run_id"]


def test_meta_json_keeps_from_the_start_what_a_recomputation_needs(tmp_path, capsys):
    out, folder = _calibrated_run(tmp_path, capsys)
    meta = json.loads((folder / "meta.json").read_text())["meta"]
    summary = json.loads((folder / "summary.json").read_text())
    assert meta["sequence_text"] == summary["sequence_text"] != ""
    assert meta["instrument"] == {k: summary["instrument"][k] for k in INSTRUMENT_FACTS}
    assert meta["gas"] == summary["results"]["gas"] == "helium"
    assert meta["calibration_id"] == out["calibration"]["record_id"]
    assert meta["mass_g"] == pytest.approx(19.62)
    assert (meta["sample_id"], meta["sequence"], meta["expansion_volume"]) == ("", "quick-demo", "small")


def test_analyze_of_a_run_without_its_summary_recomputes_it_from_meta_json(tmp_path, capsys):
    run_out, folder = _calibrated_run(tmp_path, capsys)
    rid = folder.name
    assert main(["analyze", rid, "--data", str(tmp_path), "--json"]) == 0
    whole = json.loads(capsys.readouterr().out)
    (folder / "summary.json").unlink()  # as if the process had been killed before writing it
    assert main(["analyze", rid, "--data", str(tmp_path), "--json"]) == 0
    cut = json.loads(capsys.readouterr().out)
    assert cut["interrupted"] is True and whole["interrupted"] is False
    assert cut["stored_volume_cm3"] is None and whole["stored_volume_cm3"] is not None
    # the same facts, the same sequence text and the calibration record from the catalog: the same numbers
    assert cut["chambers"] == whole["chambers"] and cut["chambers"]["source"] == run_out["calibration"]["record_id"]
    assert [c["volume_cm3"] for c in cut["cycles"]] == [c["volume_cm3"] for c in whole["cycles"]]
    assert (cut["volume_cm3"], cut["volume_u_cm3"]) == (whole["volume_cm3"], whole["volume_u_cm3"])
    assert cut["density_g_cm3"] == whole["density_g_cm3"]
    assert main(["analyze", rid, "--data", str(tmp_path)]) == 0
    text = capsys.readouterr().out
    assert "INTERRUPTED" in text and "no stored result" in text and "stored result:" not in text
    # --sequence overrides the stored text: with no cycle discarded, the first one counts too
    text = json.loads((folder / "meta.json").read_text())["meta"]["sequence_text"]
    assert "discard: 1" in text
    seq = tmp_path / "keep-all.yaml"
    seq.write_text(text.replace("discard: 1", "discard: 0"))
    assert main(["analyze", rid, "--data", str(tmp_path), "--json", "--sequence", str(seq)]) == 0
    kept = json.loads(capsys.readouterr().out)
    assert [c["kept"] for c in kept["cycles"]] == [True, True, True]
    assert [c["kept"] for c in cut["cycles"]] == [False, True, True]


def test_analyze_of_an_interrupted_run_names_what_is_missing(tmp_path, capsys):
    _out, folder = _calibrated_run(tmp_path, capsys)
    (folder / "summary.json").unlink()
    (tmp_path / "catalog.sqlite").rename(tmp_path / "elsewhere.sqlite")  # the record it names cannot be found
    # meta.json keeps the volumes themselves: no catalog needed
    assert main(["analyze", folder.name, "--data", str(tmp_path), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["chambers"]["source"] == json.loads(
        (folder / "meta.json").read_text())["meta"]["calibration_id"]
    # a meta.json from before it kept the volumes: the record it names is looked up, and is not there
    doc = json.loads((folder / "meta.json").read_text())
    del doc["meta"]["calibration"]
    (folder / "meta.json").write_text(json.dumps(doc))
    assert main(["analyze", folder.name, "--data", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "interrupted" in err and "--cell-volume" in err and "--expansion-volume" in err
    assert "--sequence" not in err  # meta.json keeps the sequence text
    # a run folder from before meta.json kept the instrument's facts: told so, not a KeyError
    doc = json.loads((folder / "meta.json").read_text())
    for key in ("instrument", "sequence_text", "gas", "calibration_id", "mass_g"):
        del doc["meta"][key]
    (folder / "meta.json").write_text(json.dumps(doc))
    assert main(["analyze", folder.name, "--data", str(tmp_path), "--cell-volume", "12 cm^3",
                 "--expansion-volume", "8 cm^3", "--sequence", "quick-demo"]) == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and "cannot be recomputed" in err and "pressure" in err


def _finished_run_with_its_trace_cut(tmp_path: Path, capsys, keep) -> Path:
    """A finished quick-demo run whose trace.csv keeps the header and the rows keep(row_fields) accepts."""
    _code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path))
    folder = tmp_path / "runs" / out["run_id"]
    header, *lines = (folder / "trace.csv").read_text().splitlines(keepends=True)
    cols = next(csv.reader([header]))
    kept = [line for line in lines if keep(dict(zip(cols, next(csv.reader([line])), strict=True)))]
    (folder / "trace.csv").write_text(header + "".join(kept))
    (folder / "trace.npz").unlink(missing_ok=True)
    return folder


@pytest.mark.parametrize("empty", ["header only", "zero bytes"])
def test_analyze_of_a_trace_without_samples_is_an_input_error(tmp_path, capsys, empty):
    folder = _finished_run_with_its_trace_cut(tmp_path, capsys, lambda row: False)
    if empty == "zero bytes":
        (folder / "trace.csv").write_bytes(b"")
    assert main(["analyze", folder.name, "--data", str(tmp_path)]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    assert len(captured.err.splitlines()) == 1
    assert str(folder / "trace.csv") in captured.err and "no samples" in captured.err


def test_analyze_of_a_trace_cut_before_any_complete_cycle_says_so(tmp_path, capsys):
    folder = _finished_run_with_its_trace_cut(tmp_path, capsys, lambda row: row["cycle"] in ("", "0"))
    assert main(["analyze", folder.name, "--data", str(tmp_path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["cycles"] == [] and out["volume_cm3"] is None
    assert any("no complete cycle" in f for f in out["flags"])
    assert main(["analyze", folder.name, "--data", str(tmp_path)]) == 0
    assert "no complete cycle was found in the trace, so there is no volume" in capsys.readouterr().out
    # a whole trace has its cycles, and no such flag
    assert main(["analyze", _finished_run_with_its_trace_cut(tmp_path / "whole", capsys, lambda row: True).name,
                 "--data", str(tmp_path / "whole"), "--json"]) == 0
    whole = json.loads(capsys.readouterr().out)
    assert len(whole["cycles"]) == 3 and not any("no complete cycle" in f for f in whole["flags"])


def _start(tmp_path: Path, *extra: str) -> subprocess.Popen:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    return subprocess.Popen([*PYCNOCTL, "run", "grain-volume", "--sim", "--realtime", "--speed", "40",
                             "--data", str(tmp_path), "--json", *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)


def _wait_for_rows(tmp_path: Path, rows: int, timeout: float = 120.0) -> Path:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        for trace in (tmp_path / "runs").glob("*/trace.csv") if (tmp_path / "runs").exists() else []:
            if trace.read_text().count("\n") > rows:
                return trace.parent
        time.sleep(0.05)
    raise AssertionError("the run did not start")


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM, signal.SIGHUP], ids=["int", "term", "hup"])
def test_ctrl_c_kill_or_a_closed_terminal_aborts_into_the_safe_state_and_keeps_the_record(tmp_path, sig):
    proc = _start(tmp_path)
    folder = _wait_for_rows(tmp_path, 150)
    proc.send_signal(sig)
    out, _ = proc.communicate(timeout=30)
    assert proc.returncode == 4
    summary = json.loads(out)
    assert summary["status"] == "aborted"
    run = load_run(folder)
    last = {k: run.trace[k][-1] for k in ("state", "valve_inlet", "valve_vent")}
    assert last == {"state": "aborted", "valve_inlet": 0, "valve_vent": 1}
    assert run.summary["results"]["status"] == "aborted"
    con = sqlite3.connect(tmp_path / "catalog.sqlite")
    assert con.execute("SELECT status FROM runs WHERE id = ?", (folder.name,)).fetchone()[0] == "aborted"
    con.close()


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP], ids=["term", "hup"])
def test_a_kill_or_a_closed_terminal_ends_a_calibration_in_the_safe_state_and_stores_nothing(tmp_path, sig):
    # Before the fix calibrate left SIGTERM and SIGHUP to their defaults: the process ended mid-step with
    # the valves as they were and the step's catalog row 'running'.
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([*PYCNOCTL, "calibrate", "--sim", "--sphere", "V=8.5802 cm^3,u=0.0004 cm^3",
                             "--data", str(tmp_path), "--yes", "--json"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    _wait_for_rows(tmp_path, 50)
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 4, err
    outcome = json.loads(out)
    assert outcome["status"] == "aborted"
    assert signal.Signals(sig).name in outcome["message"]
    # the aborted step's run is named for the volume it was calibrating only (both named it before)
    assert sum(" aborted" in (v["reason"] or "") and "run R" in (v["reason"] or "") for v in outcome["volumes"]) <= 1
    con = sqlite3.connect(tmp_path / "catalog.sqlite")
    rows = dict(con.execute("SELECT id, status FROM runs").fetchall())
    assert con.execute("SELECT COUNT(*) FROM calibrations").fetchone()[0] == 0
    con.close()
    assert "running" not in rows.values()
    for run_id in (r for r, status in rows.items() if status == "aborted"):
        run = load_run(tmp_path / "runs" / run_id)
        last = {k: run.trace[k][-1] for k in ("state", "valve_inlet", "valve_vent")}
        assert last == {"state": "aborted", "valve_inlet": 0, "valve_vent": 1}


def test_sigkill_mid_run_leaves_a_readable_trace_and_a_consistent_catalog(tmp_path):
    proc = _start(tmp_path)
    folder = _wait_for_rows(tmp_path, 300)
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=10)
    run = load_run(folder)  # tolerates a torn last line
    assert run.n_samples >= 300
    assert run.summary is None  # it never got to write one
    con = sqlite3.connect(tmp_path / "catalog.sqlite")
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    status = con.execute("SELECT status FROM runs WHERE id = ?", (folder.name,)).fetchone()[0]
    assert status == "running"  # the next start of the daemon marks it interrupted, never resumes it
    con.close()


def test_a_run_killed_before_its_summary_is_analysed_from_its_trace(tmp_path, capsys):
    proc = _start(tmp_path)
    folder = _wait_for_rows(tmp_path, 300)
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=10)
    assert not (folder / "summary.json").exists()
    # it ran on the simulator's nominal volumes (no calibration in this catalog): meta.json keeps them
    assert main(["analyze", folder.name, "--data", str(tmp_path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["interrupted"] is True and out["chambers"]["source"] is None  # nominal: no record
    assert (out["chambers"]["vc_cm3"], out["chambers"]["vr_cm3"]) == pytest.approx((12.0, 8.0))
    assert main(["analyze", folder.name, "--data", str(tmp_path), "--json", "--sequence", "grain-volume",
                 "--cell-volume", "12 cm^3", "--expansion-volume", "8 cm^3"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["interrupted"] is True and out["stored_volume_cm3"] is None
    assert out["sequence"] == "grain-volume" and out["chambers"]["source"] == "command line"
    assert main(["analyze", folder.name, "--data", str(tmp_path), "--cell-volume", "12 cm^3",
                 "--expansion-volume", "8 cm^3"]) == 0
    assert "INTERRUPTED" in capsys.readouterr().out


def _damage(folder: Path, how: str) -> None:
    meta = folder / "meta.json"
    if how == "meta cut short":
        meta.write_text(meta.read_text()[:100])
    elif how == "meta a list":
        meta.write_text("[]")
    elif how in ("cov one number", "negative Vc", "unknown gas"):
        doc = json.loads(meta.read_text())
        if how == "cov one number":
            doc["meta"]["calibration"]["cov"] = [[1]]
        elif how == "negative Vc":
            doc["meta"]["calibration"]["vc"] = -1e-5
        else:
            doc["meta"]["gas"] = "xenonium"
        meta.write_text(json.dumps(doc))
    elif how == "trace garbage":
        (folder / "trace.csv").write_bytes(bytes(range(256)) * 12)
        (folder / "trace.npz").unlink(missing_ok=True)


@pytest.mark.parametrize("how", ["meta cut short", "meta a list", "cov one number", "negative Vc", "unknown gas",
                                 "trace garbage"])
def test_analyze_of_a_damaged_record_is_one_line_naming_it(tmp_path, capsys, how):
    # found by a sweep: each ended "failed: JSONDecodeError / AttributeError / ValueError / UnknownGas"
    # (exit 3), and a negative Vc reached the settle maths ("remainder_gain must be a finite factor")
    _code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path))
    folder = tmp_path / "runs" / out["run_id"]
    (folder / "summary.json").unlink()  # an interrupted run: meta.json is what is read
    _damage(folder, how)
    assert main(["analyze", folder.name, "--data", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "failed" not in err and str(folder) in err, err


def test_analyze_refuses_a_negative_volume_uncertainty(tmp_path, capsys):
    _code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path))
    assert main(["analyze", out["run_id"], "--data", str(tmp_path), "--cell-volume", "12 cm3", "--expansion-volume",
                 "8 cm3", "--u-cell-volume", "-1 cm3"]) == 2  # was taken by its magnitude
    assert "zero or positive" in capsys.readouterr().err


def test_run_refuses_a_calibration_sequence(tmp_path, capsys):
    # found by a sweep: it ran as a measurement of the empty cell and stored no calibration (exit 0)
    assert main(["run", "calibration", "--sim", "--data", str(tmp_path)]) == 2
    assert "calibration sequence (kind: calibrate): run it with pycnoctl calibrate" in capsys.readouterr().err
    assert not (tmp_path / "runs").exists()


def test_analyze_refuses_a_settle_window_the_trace_cannot_fill(tmp_path, capsys):
    # found by a sweep: `run` refused such a window, `analyze --sequence` took it and every settle said
    # "not settled: too few samples", ending with no volume and exit 0
    _code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path))
    text = resolve_sequence("quick-demo").read_text()
    seq = tmp_path / "short.yaml"
    seq.write_text(text.replace("  window: 4 s", "  window: 0.19 s", 1))
    assert main(["analyze", out["run_id"], "--data", str(tmp_path), "--sequence", str(seq)]) == 2
    err = capsys.readouterr().err
    line = 1 + text.splitlines().index("  window: 4 s")
    assert f"short.yaml:{line}:" in err and "holds 2 samples" in err and "at least 0.2 s" in err


def test_a_recomputation_with_windows_too_short_counts_the_fills(tmp_path, capsys):
    # found by a sweep: with no zero taken no cycle starts, and the notes said "P1 of cycle 0" and
    # "baseline before fill 1" for every fill.  (The command line refuses such windows; a settle can
    # still hold too few samples where readings drop out, so the recomputation itself is asked.)
    from pycnoctl.controller.domain.gaspath import ChamberCalibration
    from pycnoctl.controller.record.replay import REPLAY_COLUMNS, reanalyze
    from pycnoctl.controller.run.sequence import sequence_from_text

    _code, out = run_json(capsys, "quick-demo", "--sim", "--data", str(tmp_path))
    text = resolve_sequence("quick-demo").read_text()
    assert "  window: 4 s" in text
    seq = sequence_from_text(text.replace("  window: 4 s", "  window: 0.19 s", 1), "short.yaml")
    run = load_run(tmp_path / "runs" / out["run_id"], trace_columns=REPLAY_COLUMNS)
    flags = reanalyze(run, seq, chambers=ChamberCalibration(12e-6, 8e-6), gas="helium", pressure_is_gauge=True,
                      pressure_u=1.0, temperature_u=0.01).flags
    assert not any("cycle 0" in f for f in flags)
    assert [f.split(":")[0] for f in flags if f.startswith("baseline")] == \
        [f"baseline before fill {n}" for n in range(1, 4)]
    assert any(f.startswith("P1 of fill 1 (no cycle") for f in flags)
