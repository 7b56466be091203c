"""Provenance: a calibration is bound to the instrument, volume and gas it was made for; an uncalibrated
run says so and carries the nominal volumes' stated uncertainty; the catalog migrates; the
calibrations verb lists, shows, selects, retires and imports.

The physics checked here is GUM propagation of the nominal volumes' uncertainty (JCGM 100:2008, eq. 10
for independent inputs); the rest is bookkeeping, checked against what was put in."""

from __future__ import annotations

import json
import math
import sqlite3
from pathlib import Path

import pytest
import yaml

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.controller.jobs.calibration_use import CalibrationRefused, use_latest_calibration
from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import SCHEMA_VERSION, CalibrationRecord, Catalog
from pycnoctl.controller.run.control import Controller
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import DEFAULT_CONFIG
from pycnoctl.sim.testing import make

QUICK = "quick-demo"
SHIPPED_INLET = yaml.safe_load(DEFAULT_CONFIG.read_text(encoding="utf-8"))["valves"]["inlet"]


def bench(update: dict | None = None, **top):
    """The shipped clean bench (sim.testing.make gives it a faster inlet) with updates merged in."""
    return make({"valves": {"inlet": dict(SHIPPED_INLET)}, **(update or {})}, **top)


def _run(inst, catalog, tmp_path, sequence=QUICK, **req):
    return execute(prepare(RunRequest(sequence, **req), inst, catalog), Controller(inst), root=tmp_path / "runs",
                   catalog=catalog)


def test_identity_follows_the_gas_path_not_the_noise_or_the_seed() -> None:
    a, b = build_sim_instrument(make()), build_sim_instrument(make())
    assert a.identity == b.identity and a.identity.startswith("sim:") and a.simulated
    noisy = build_sim_instrument(make({"instruments": {"pressure": {"noise": "20 Pa"}}}, seed=7))
    assert noisy.identity == a.identity
    bigger = build_sim_instrument(make({"volumes": {"small": {"volume": "8.5 cm^3"}}}))
    assert bigger.identity != a.identity
    # the fingerprint follows what the instrument believes (nominal chambers), and changes with it
    believes = build_sim_instrument(make(nominal={"expansion": {"small": "8.2 cm^3"}}))
    assert believes.fingerprint != a.fingerprint


def test_a_calibration_of_another_instrument_is_never_used(tmp_path: Path) -> None:
    cat = Catalog(tmp_path / "c.sqlite")
    other = build_sim_instrument(bench({"volumes": {"small": {"volume": "8.5 cm^3"}}}))
    # another build's calibration, 3.7 % off in Vr for this one, and one made before identities existed
    cat.put_calibration(CalibrationRecord("small", "helium", 12e-6, 8.3e-6, cov=[[1e-16, 0], [0, 1e-16]],
                                          instrument=other.identity))
    cat.put_calibration(CalibrationRecord("small", "helium", 12e-6, 8.3e-6, cov=[[1e-16, 0], [0, 1e-16]]))
    inst = build_sim_instrument(bench())
    s = _run(inst, cat, tmp_path)
    assert s["status"] == "completed" and s["calibration"]["record_id"] is None and s["calibrated"] is False
    warning = next(w for w in s["warnings"] if w.startswith("UNCALIBRATED"))
    assert "2 made on" in warning and other.identity in warning and "are not used here" in warning
    # the result sits on the true 5 cm^3 (the simulator's nominal volumes are its true ones) ...
    assert s["volume_cm3"] == pytest.approx(5.0, abs=s["volume_u_cm3"])


def test_an_uncalibrated_run_carries_the_stated_nominal_uncertainty(tmp_path: Path) -> None:
    cat = Catalog(tmp_path / "c.sqlite")
    inst = build_sim_instrument(bench(nominal={"u": 0.004}))
    s = _run(inst, cat, tmp_path)
    rows = {b["name"]: b for b in s["budget"]}
    vc, vr = inst.chambers.cell, inst.chambers.expansion["small"]
    assert rows["cell volume Vc"]["std_u"] == pytest.approx(0.004 * vc, rel=1e-12)
    assert rows["expansion volume Vr"]["std_u"] == pytest.approx(0.004 * vr, rel=1e-12)
    # GUM (JCGM 100:2008 eq. 10): Vs = Vc - Vr*y, so the two volume terms alone give
    # u^2 >= u(Vc)^2 + y^2 u(Vr)^2 with y = (Vc - Vs)/Vr; the run's u must be at least that
    y = (vc - s["volume_cm3"] * 1e-6) / vr
    floor = math.hypot(0.004 * vc, y * 0.004 * vr)
    assert s["volume_u_std_cm3"] * 1e-6 >= floor * (1 - 1e-9)
    assert s["volume_u_std_cm3"] * 1e-6 < 1.5 * floor  # and the volumes dominate, as they must uncalibrated


def test_no_calibration_and_no_stated_nominal_uncertainty_is_refused_before_anything_moves(tmp_path: Path) -> None:
    cfg = tmp_path / "inst.yaml"
    cfg.write_text("name: bench-without-u\nvalves: {kind: sim}\npressure: {kind: sim}\nthermometer: {kind: sim}\n"
                   "barometer: {kind: sim}\nchambers:\n  cell: 12 cm^3\n  expansion: {small: 8 cm^3, large: 20 cm^3}\n")
    from pycnoctl.drivers.config import build_instrument, load_instrument_config

    inst = build_instrument(load_instrument_config(cfg))
    cat = Catalog(tmp_path / "c.sqlite")
    bank = inst.extras["sim"]
    moved_before = dict(bank.valve_states()) if hasattr(bank, "valve_states") else None
    with pytest.raises(CalibrationRefused, match="states no uncertainty of its nominal volumes"):
        _run(inst, cat, tmp_path)
    assert cat.list_runs() == []  # no row, no record: nothing started
    # the command line says it in one line, exit 2 (input missing), no traceback
    assert cli.main(["run", "quick-demo", "--instrument", str(cfg), "--quiet", "--data", str(tmp_path / "d")]) == 2
    if moved_before is not None:
        assert dict(bank.valve_states()) == moved_before
    # stating it in the config lets the run go, uncalibrated
    cfg.write_text(cfg.read_text().replace("large: 20 cm^3}", "large: 20 cm^3}\n  nominal_u: 0.8 %"))
    inst = build_instrument(load_instrument_config(cfg))
    assert inst.chambers.nominal_u == pytest.approx(0.008)
    assert _run(inst, cat, tmp_path)["calibrated"] is False


def test_a_nominal_uncertainty_of_zero_or_without_sense_is_refused_at_load(tmp_path: Path) -> None:
    from pycnoctl.drivers.config import load_instrument_config

    for bad in ("0 %", "80 %", "true"):
        cfg = tmp_path / "inst.yaml"
        cfg.write_text("name: b\nvalves: {kind: sim}\npressure: {kind: sim}\nchambers:\n  cell: 12 cm^3\n"
                       f"  expansion: {{small: 8 cm^3, large: 20 cm^3}}\n  nominal_u: {bad}\n")
        with pytest.raises(ConfigError) as err:
            load_instrument_config(cfg)
        assert "nominal_u" in str(err.value) and ":7:" in str(err.value)


def test_a_retired_calibration_is_not_used_and_a_chosen_one_wins_over_the_newest(tmp_path: Path) -> None:
    inst = build_sim_instrument(bench())
    cat = Catalog(tmp_path / "c.sqlite")
    cov = [[1e-16, 0.0], [0.0, 1e-16]]
    old = cat.put_calibration(CalibrationRecord("small", "helium", 12.0e-6, 8.0e-6, cov=cov, instrument=inst.identity,
                                                created="2026-11-01T00:00:00.000000Z"))
    new = cat.put_calibration(CalibrationRecord("small", "helium", 12.1e-6, 8.1e-6, cov=cov, instrument=inst.identity,
                                                created="2026-11-02T00:00:00.000000Z"))
    assert cat.latest_calibration("small", "helium", inst.identity).id == new
    cat.choose_calibration(old, inst.identity)
    assert cat.latest_calibration("small", "helium", inst.identity).id == old
    cat.retire_calibration(old, "expansion valve replaced")
    assert cat.latest_calibration("small", "helium", inst.identity).id == new  # the choice went with it
    with pytest.raises(Exception, match="retired"):
        cat.choose_calibration(old, inst.identity)
    with pytest.raises(Exception, match="made on instrument"):
        cat.choose_calibration(new, "some-other-bench")
    cat.retire_calibration(new, "drifted")
    use = use_latest_calibration(inst, cat, expansion_volume="small", gas="helium")
    assert use.record is None and use.warnings[0].startswith("UNCALIBRATED")


def test_a_version_1_catalog_is_migrated_and_its_calibrations_wait_to_be_bound(tmp_path: Path) -> None:
    path = tmp_path / "v1.sqlite"
    con = sqlite3.connect(path)
    con.executescript("""
        CREATE TABLE schema_version (version INTEGER NOT NULL);
        INSERT INTO schema_version VALUES (1);
        CREATE TABLE calibrations (id TEXT PRIMARY KEY, created TEXT NOT NULL, expansion_volume TEXT NOT NULL,
            gas TEXT NOT NULL, fill_pressure REAL, temperature REAL, operator TEXT, vc REAL NOT NULL,
            vr REAL NOT NULL, cov TEXT, spheres TEXT, residuals TEXT, payload TEXT);
        INSERT INTO calibrations (id, created, expansion_volume, gas, vc, vr, cov)
            VALUES ('C20261101T000000Z-abcdef', '2026-11-01T00:00:00.000000Z', 'small', 'helium', 1.2e-05,
                    8e-06, '[[1e-16, 0.0], [0.0, 1e-16]]');
        CREATE TABLE runs (id TEXT PRIMARY KEY, created TEXT NOT NULL, sample_id TEXT, sequence_name TEXT,
            kind TEXT NOT NULL,
            status TEXT NOT NULL CHECK (status IN ('queued','running','completed','fault','aborted','interrupted')),
            started TEXT, ended TEXT, folder TEXT, volume_m3 REAL, u_volume_m3 REAL, density REAL, mass REAL,
            message TEXT, calibration_id TEXT REFERENCES calibrations (id));
        CREATE TABLE cycles (run_id TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE, idx INTEGER NOT NULL,
            p1 REAL, p2 REAL, volume REAL, kept INTEGER NOT NULL, PRIMARY KEY (run_id, idx));
        INSERT INTO runs (id, created, sample_id, kind, status, volume_m3, calibration_id) VALUES
            ('R20261101T000000Z-aaaaaa', '2026-11-01T01:00:00.000000Z', 'AL-1', 'measure', 'completed', 5e-06,
             'C20261101T000000Z-abcdef'),
            ('R20261101T000000Z-bbbbbb', '2026-11-01T02:00:00.000000Z', 'AL-2', 'measure', 'queued', NULL, NULL);
        INSERT INTO cycles VALUES ('R20261101T000000Z-aaaaaa', 1, 1.3e5, 0.6e5, 5e-06, 1);
    """)
    con.commit()
    con.close()
    cat = Catalog(path)
    assert cat.schema_version() == SCHEMA_VERSION == 2
    # the runs table was rebuilt to take the status 'cancelled'; rows, cycles and indexes kept
    assert cat.get_run("R20261101T000000Z-aaaaaa").volume_m3 == 5e-06
    assert [c.p1 for c in cat.get_cycles("R20261101T000000Z-aaaaaa")] == [1.3e5]
    cat.update_status("R20261101T000000Z-bbbbbb", "cancelled", "removed from the queue")
    assert cat.get_run("R20261101T000000Z-bbbbbb").status == "cancelled"
    assert cat.integrity_check() == "ok"
    assert cat._read("PRAGMA foreign_key_check") == [] and cat._read("PRAGMA foreign_keys")[0][0] == 1
    indexes = {r[0] for r in cat._read("SELECT name FROM sqlite_master WHERE type = 'index' AND tbl_name = 'runs'")}
    assert {"runs_by_created", "runs_by_sample", "runs_by_status"} <= indexes
    rec = cat.get_calibration("C20261101T000000Z-abcdef")
    assert rec is not None and rec.instrument is None and rec.vc == 1.2e-05
    inst = build_sim_instrument(bench())
    assert cat.latest_calibration("small", "helium", inst.identity) is None  # never applied unbound
    cat.choose_calibration(rec.id, inst.identity)  # the operator vouches for it: bound to this instrument
    assert cat.latest_calibration("small", "helium", inst.identity).id == rec.id
    assert cat.get_calibration(rec.id).instrument == inst.identity
    cat.close()
    assert Catalog(path).schema_version() == 2  # opening again changes nothing


def test_a_sequence_in_another_gas_is_refused_before_the_run(tmp_path: Path) -> None:
    seq = tmp_path / "n2.yaml"
    from pycnoctl.controller.run.sequence import resolve_sequence

    text = resolve_sequence(QUICK).read_text()
    assert "gas: helium" in text
    seq.write_text(text.replace("gas: helium", "gas: nitrogen"))
    with pytest.raises(ConfigError) as err:
        prepare(RunRequest(seq), build_sim_instrument(bench()))
    assert "measures in nitrogen" in str(err.value) and "plumbed for helium" in str(err.value)


def test_sample_defaults_of_the_sequence_are_used(tmp_path: Path) -> None:
    from pycnoctl.controller.run.sequence import resolve_sequence

    text = resolve_sequence(QUICK).read_text()
    seq = tmp_path / "with-mass.yaml"
    seq.write_text(text + "\nsample_defaults:\n  mass: 19.62 g\n  bulk_volume: 6 cm^3\n"
                   if "sample_defaults" not in text else text)
    p = prepare(RunRequest(seq), build_sim_instrument(bench()))
    assert p.request.mass == pytest.approx(19.62e-3) and p.request.bulk_volume == pytest.approx(6e-6)
    # the command line wins
    p = prepare(RunRequest(seq, mass=1e-3), build_sim_instrument(bench()))
    assert p.request.mass == pytest.approx(1e-3)


@pytest.mark.parametrize(("cell", "volume", "key"), [("12 m^3", "8 cm3", "--cell-volume"),
                                                     ("13.2 cm3", "8 cm3", "--cell-volume"),
                                                     ("12 cm3", "0.008 cm3", "--volume")])
def test_an_import_far_from_the_configs_nominal_volumes_is_refused_unless_said(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], cell: str, volume: str, key: str) -> None:
    """Found by a sweep: '12 m^3' for the cell was stored and the next run stated 11999993 cm3 for a 5 cm3
    specimen (exit 0, no word without a mass); 13.2 cm3 for the clean simulator's 12 cm3 cell, whose config
    states its nominal volumes to 0.5 %, gave 6.2 cm3 for 5.  Beyond 5 of the config's stated
    uncertainties (and 2 %) an import is refused; --far-from-nominal records it (a rebuilt chamber)."""
    args = ["calibrations", "import", "--sim", "--expansion-volume", "small", "--cell-volume", cell,
            "--u-cell-volume", "0.002 cm3", "--volume", volume, "--u-volume", "0.00002 cm3",
            "--note", "volumes from elsewhere", "--data", str(tmp_path)]
    assert cli.main(args) == 2
    err = capsys.readouterr().err
    assert f"{key}: " in err and "from the instrument config's" in err and "--far-from-nominal" in err
    assert cli.main([*args, "--far-from-nominal"]) == 0
    assert "imported" in capsys.readouterr().out


def test_an_import_near_the_configs_nominal_volumes_is_taken(tmp_path: Path,
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    # 2.0 % off a 12 cm3 cell stated to 0.5 %: within 5 of its uncertainties (the floor is 2 %)
    assert cli.main(["calibrations", "import", "--sim", "--expansion-volume", "small", "--cell-volume", "12.24 cm3",
                     "--u-cell-volume", "0.002 cm3", "--volume", "7.85 cm3", "--u-volume", "0.002 cm3",
                     "--note", "volumes from elsewhere", "--data", str(tmp_path)]) == 0


def test_the_calibrations_verb(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                               monkeypatch: pytest.MonkeyPatch) -> None:
    data = ["--data", str(tmp_path)]
    # an import needs both uncertainties, and a sane one
    assert cli.main(["calibrations", "import", "--sim", "--expansion-volume", "small", "--cell-volume", "12.01 cm3",
                     "--u-cell-volume", "0 cm3", "--volume", "8.0 cm3", "--u-volume", "0.004 cm3",
                     "--note", "water filling", *data]) == 2
    assert "never true" in capsys.readouterr().err
    # a negative volume is wrong for its own reason: the message must not talk of an uncertainty
    assert cli.main(["calibrations", "import", "--sim", "--expansion-volume", "small", "--cell-volume", "12.01 cm3",
                     "--u-cell-volume", "0.005 cm3", "--volume", "-8.0 cm3", "--u-volume", "0.004 cm3",
                     "--note", "water filling", *data]) == 2
    err = capsys.readouterr().err
    assert "--volume: must be a positive volume" in err and "uncertainty" not in err
    assert cli.main(["calibrations", "import", "--sim", "--expansion-volume", "small", "--cell-volume", "12.01 cm3",
                     "--u-cell-volume", "0.005 cm3", "--volume", "8.0 cm3", "--u-volume", "0.004 cm3",
                     "--note", "water filling", "--operator", "tech-a", *data]) == 0
    cid = capsys.readouterr().out.split()[1]
    assert cli.main(["calibrations", "list", "--sim", "--json", *data]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [(r["id"], r["in_use"], r["source"]) for r in rows] == [(cid, True, "imported")]
    monkeypatch.setenv("COLUMNS", "80")  # the table at 80 columns: the ID (what show and select take) is never cut
    assert cli.main(["calibrations", "list", "--sim", *data]) == 0
    monkeypatch.delenv("COLUMNS")
    table = capsys.readouterr().out
    assert cid in table and max(len(line) for line in table.splitlines()) <= 80
    assert rows[0]["u_vc_cm3"] == pytest.approx(0.005) and rows[0]["vr_cm3"] == pytest.approx(8.0)
    # a run on this instrument computes with it
    cat = Catalog(tmp_path / "catalog.sqlite")
    s = _run(build_sim_instrument(None), cat, tmp_path)
    assert s["calibration"]["record_id"] == cid and s["calibrated"] is True
    cat.close()
    assert cli.main(["calibrations", "show", cid, *data]) == 0
    shown = capsys.readouterr().out
    assert "source: imported" in shown and "note: water filling" in shown and "Vc = 12.01000 cm3" in shown
    # on another simulated build it is not listed as in use, nor may it be selected there
    other = tmp_path / "other.yaml"
    shipped = DEFAULT_CONFIG.read_text(encoding="utf-8")
    assert "small:  {volume: 8 cm^3" in shipped
    other.write_text(shipped.replace("small:  {volume: 8 cm^3", "small:  {volume: 8.5 cm^3"))
    assert cli.main(["calibrations", "list", "--sim", str(other), "--json", *data]) == 0
    assert json.loads(capsys.readouterr().out) == []
    assert cli.main(["calibrations", "select", cid, "--sim", str(other), *data]) == 2
    assert "made on instrument" in capsys.readouterr().err
    assert cli.main(["calibrations", "retire", cid, "--reason", "superseded", *data]) == 0
    capsys.readouterr()
    assert cli.main(["calibrations", "list", "--all", "--csv", *data]) == 0
    assert "superseded" in capsys.readouterr().out
    assert cli.main(["calibrations", "show", "C20990101T000000Z-000000", *data]) == 2


def test_the_runs_table_says_simulated_and_uncalibrated(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("COLUMNS", "160")
    assert cli.main(["run", "quick-demo", "--sim", "--quiet", "--data", str(tmp_path)]) == 0
    capsys.readouterr()
    assert cli.main(["runs", "--data", str(tmp_path)]) == 0
    assert "simulated, uncalibrated" in capsys.readouterr().out


def test_calibrations_of_a_hardware_config_need_no_device_opened(tmp_path: Path,
                                                                 capsys: pytest.CaptureFixture[str]) -> None:
    """import / list / select with --instrument read the config only: the serial ports named in the
    shipped example do not exist here, and nothing tries to open them."""
    cfg = str(Path(__file__).resolve().parents[1] / "drivers" / "instruments" / "usb-relay-serial-gauge.yaml")
    data = ["--data", str(tmp_path)]
    assert cli.main(["calibrations", "import", "--instrument", cfg, "--expansion-volume", "small",
                     "--cell-volume", "12.02 cm3", "--u-cell-volume", "0.01 cm3", "--volume", "8.49 cm3",
                     "--u-volume", "0.01 cm3", "--note", "water filling", *data]) == 0
    assert "on soils-pyc-02" in capsys.readouterr().out  # the config's instrument_id
    assert cli.main(["calibrations", "list", "--instrument", cfg, "--json", *data]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert len(rows) == 1 and rows[0]["in_use"] and rows[0]["instrument"] == "soils-pyc-02"
    # an unknown volume name is refused with the instrument's own
    assert cli.main(["calibrations", "import", "--instrument", cfg, "--expansion-volume", "tiny",
                     "--cell-volume", "12 cm3", "--u-cell-volume", "0.01 cm3", "--volume", "8 cm3",
                     "--u-volume", "0.01 cm3", "--note", "x", *data]) == 2
    assert "small" in capsys.readouterr().err
    # a calibration from before identities (unbound) is bound by selecting it for this instrument
    cat = Catalog(tmp_path / "catalog.sqlite")
    old = cat.put_calibration(CalibrationRecord("large", "helium", 12e-6, 22e-6, cov=[[1e-16, 0], [0, 1e-16]]))
    cat.close()
    assert cli.main(["calibrations", "select", old, "--instrument", cfg, *data]) == 0
    capsys.readouterr()
    assert cli.main(["calibrations", "list", "--instrument", cfg, "--json", *data]) == 0
    rows = {r["id"]: r for r in json.loads(capsys.readouterr().out)}
    assert rows[old]["instrument"] == "soils-pyc-02" and rows[old]["in_use"]


def test_show_says_when_the_calibration_a_run_used_was_retired_since(tmp_path: Path,
                                                                     capsys: pytest.CaptureFixture[str],
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    # calibrations retire takes no data-folder lock (it changes the catalog in one transaction, and must
    # work while the daemon serves): a run keeps the calibration it started with, and show must say
    # when that one was retired after the run
    monkeypatch.setenv("COLUMNS", "200")
    data = ["--data", str(tmp_path)]
    assert cli.main(["calibrations", "import", "--sim", "--expansion-volume", "small", "--cell-volume", "12.0 cm3",
                     "--u-cell-volume", "0.005 cm3", "--volume", "8.0 cm3", "--u-volume", "0.004 cm3",
                     "--note", "water filling", *data]) == 0
    cid = capsys.readouterr().out.split()[1]
    assert cli.main(["run", "quick-demo", "--sim", "--quiet", "--json", *data]) == 0
    run_id = json.loads(capsys.readouterr().out)["run_id"]
    assert cli.main(["show", run_id, *data]) == 0
    assert "RETIRED" not in capsys.readouterr().out
    assert cli.main(["calibrations", "retire", cid, "--reason", "expansion valve replaced", *data]) == 0
    capsys.readouterr()
    assert cli.main(["show", run_id, *data]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert f"RETIRED since this run: calibration {cid}" in out and "expansion valve replaced" in out


def test_calibrations_show_gives_each_sphere_in_cm3(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # found by a sweep: each sphere was printed as the stored dict, its volume in m^3
    data = ["--data", str(tmp_path)]
    assert cli.main(["calibrate", "--sim", "--sphere", "V=5 cm3,u=0.001 cm3", "--sphere", "V=8 cm3,u=0.001 cm3",
                     "--expansion-volume", "small", "--yes", "--json", *data]) == 0
    capsys.readouterr()
    assert cli.main(["calibrations", "list", "--all", "--json", *data]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows, "the calibration was not stored"
    assert cli.main(["calibrations", "show", rows[0]["id"], *data]) == 0
    text = capsys.readouterr().out
    assert "sphere 1: 5.00000 cm3, u = 0.00100 cm3 (k = 1); certificate 'V=5 cm3,u=0.001 cm3'" in text
    assert "empty cell: nothing in the cell" in text and "{'label'" not in text
