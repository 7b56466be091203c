"""Calibration end to end on the simulator: true chamber volumes recovered, a sphere measured as an
unknown, a mixed-up sphere refused, and a run's calibration checks (stale, mismatched)."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.jobs.calibration import SimCellLoader, calibrate, parse_sphere
from pycnoctl.controller.jobs.calibration_use import AGE_RULE, CalibrationPolicy, use_latest_calibration
from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import CalibrationRecord, Catalog
from pycnoctl.controller.run.control import Controller
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import Nominal, load_sim_config

# Short sequences: the shipped ones' settle rules, fewer purge pulses and cycles (the simulator's
# clean bench settles quickly; what is tested is the workflow, not the purge).
_COMMON = """
gas: helium
purge: {pulses: 1, pressure: 1.0 bar, hold: 1 s, vent: 2 s}
fill: {target: 1.30 bar, timeout: 60 s, overshoot: 0.05 bar}
settle: {window: 10 s, max_drift: 0.5 Pa/s, min_time: 5 s, max_time: 300 s, on_timeout: fault}
vent: {time: 15 s, timeout: 60 s, baseline_tolerance: 1 kPa}
cycles: {count: 3, discard: 1}
"""
CAL_SEQ = "format: pycnoctl-sequence/1\nname: cal-short\nkind: calibrate\nexpand: {volume: small}\n" + _COMMON
MEAS_SEQ = "format: pycnoctl-sequence/1\nname: meas-short\nkind: measure\nexpand: {volume: small}\n" + _COMMON
TRUE_VC, TRUE_VR = 12e-6, 8e-6  # sim/configs/clean.yaml: cell 12 cm^3 (no links), small 8 cm^3
SPHERE = "D=25.400 mm,u=0.002 mm"


def _config():
    # The instrument believes wrong volumes (nominal); the calibration must find the simulator's truth.
    cfg = load_sim_config(None)
    return cfg.model_copy(update={"nominal": Nominal(cell="11.6 cm^3", expansion={"small": "8.3 cm^3"})})


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory: pytest.TempPathFactory):
    d = tmp_path_factory.mktemp("cal")
    (d / "cal.yaml").write_text(CAL_SEQ)
    (d / "meas.yaml").write_text(MEAS_SEQ)
    cat = Catalog(d / "catalog.sqlite")
    out = calibrate([parse_sphere(SPHERE)], SimCellLoader(_config()), catalog=cat, root=d / "runs",
                    expansion_volumes=["small"], sequence=d / "cal.yaml", operator="tech-b")
    yield d, cat, out
    cat.close()


def test_true_volumes_recovered_within_stated_uncertainty(calibrated) -> None:
    _, cat, out = calibrated
    assert out.status == "stored", out.message
    (o,) = out.outcomes
    k = 2.0  # expanded, coverage about 95 % (JCGM 100:2008 6.3)
    assert abs(o.fit.vc - TRUE_VC) <= k * o.fit.u_vc
    assert abs(o.fit.vr - TRUE_VR) <= k * o.fit.u_vr
    # the fit's u is dominated by the sphere certificate: u(Vc) ~ Vc u(Vk)/Vk [D from two_point], 0.033 %
    assert o.fit.u_vc / o.fit.vc == pytest.approx(parse_sphere(SPHERE).u_volume / parse_sphere(SPHERE).volume,
                                                  rel=0.1)
    rec = cat.latest_calibration("small", "helium")
    assert rec is not None and rec.id == o.record_id
    assert rec.operator == "tech-b" and rec.vc == o.fit.vc and len(rec.residuals) == o.fit.n_runs
    assert [s["label"] for s in rec.spheres] == ["empty cell", "sphere 1"]
    assert rec.temperature == pytest.approx(295.15, abs=0.1)  # clean.yaml lab at 22 degC
    assert rec.payload["run_ids"] == o.run_ids and len(o.run_ids) == 2


def test_sphere_as_unknown_within_0_05_percent(calibrated) -> None:
    d, cat, out = calibrated
    sphere = parse_sphere(SPHERE)
    inst = SimCellLoader(_config()).load(1, sphere)
    s = execute(prepare(RunRequest(d / "meas.yaml", sample_id="REF-1"), inst), Controller(inst),
                root=d / "runs", catalog=cat)
    assert s["status"] == "completed"
    err = s["volume_cm3"] * 1e-6 / sphere.volume - 1.0
    assert abs(err) < 5e-4, f"{100 * err:.4f} %"
    assert s["calibration"]["record_id"] == out.outcomes[0].record_id
    assert s["calibration"]["record"]["operator"] == "tech-b"
    assert cat.get_run(s["run_id"]).calibration_id == out.outcomes[0].record_id
    assert s["warnings"] == []
    assert s["expansion_volume_choice"] == "sequence"
    # without the calibration the wrong nominal volumes give a clearly wrong volume (the check can fail)
    inst2 = SimCellLoader(_config()).load(1, sphere)
    empty = Catalog(d / "empty.sqlite")
    s2 = execute(prepare(RunRequest(d / "meas.yaml"), inst2), Controller(inst2), root=d / "runs2", catalog=empty)
    assert abs(s2["volume_cm3"] * 1e-6 / sphere.volume - 1.0) > 0.01
    assert any(w.startswith("UNCALIBRATED: no calibration") for w in s2["warnings"])


def test_mixed_up_sphere_is_refused(tmp_path: Path) -> None:
    (tmp_path / "cal.yaml").write_text(CAL_SEQ)
    cat = Catalog(tmp_path / "catalog.sqlite")
    spheres = [parse_sphere(SPHERE), parse_sphere("V=4.1888 cm^3,u=0.0004 cm^3")]
    # the operator loads a ball 1 % larger than the certificate he entered for sphere 2
    loader = SimCellLoader(_config(), actual={"sphere 2": 1.01 * spheres[1].volume})
    out = calibrate(spheres, loader, catalog=cat, root=tmp_path / "runs", expansion_volumes=["small"],
                    sequence=tmp_path / "cal.yaml")
    assert out.status == "refused"
    assert "chi-square" in out.outcomes[0].reason
    assert cat.latest_calibration("small", "helium") is None  # nothing stored


def _record(**kw) -> CalibrationRecord:
    base = dict(expansion_volume="small", gas="helium", vc=12e-6, vr=8e-6, fill_pressure=1.0e5, temperature=295.15,
                cov=[[1e-18, 0.0], [0.0, 1e-18]], payload={"fill_target_pa": 1.3e5,
                                                          "fill_pressure_range_pa": [0.97e5, 1.18e5]})
    base.update(kw)
    return CalibrationRecord(**base)


def _created(days_ago: float) -> str:
    t = dt.datetime.now(dt.UTC) - dt.timedelta(days=days_ago)
    return t.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def test_checks_stale_mismatched_and_applied(tmp_path: Path) -> None:
    cat = Catalog(tmp_path / "c.sqlite")
    inst = build_sim_instrument(None)
    me = inst.identity
    policy = CalibrationPolicy()
    # fresh and matching: applied, no warning
    cat.put_calibration(_record(created=_created(0.5), instrument=me))
    use = use_latest_calibration(inst, cat, expansion_volume="small", gas="helium", fill_target=1.3e5, policy=policy)
    assert use.warnings == [] and inst.chambers.for_expansion("small").record_id == use.record.id
    ok = {"cycles": [{"kept": True, "p1_gauge_pa": 1.0e5, "t1_k": 295.5}]}
    assert use.after_run(ok) == []
    # fill outside the calibrated range by more than 5 %, gas 2.5 K warmer
    late = use.after_run({"cycles": [{"kept": True, "p1_gauge_pa": 1.3e5, "t1_k": 297.65}]})
    assert any("fill pressure" in w for w in late) and any("+2.50 K" in w for w in late)
    # another fill target
    use = use_latest_calibration(inst, cat, expansion_volume="small", gas="helium", fill_target=2.0e5, policy=policy)
    assert any("fill pressure target" in w for w in use.warnings)
    # stale: older than the 7-day default; the warning names the ASTM D4892 daily rule
    cat.put_calibration(_record(created=_created(9), instrument=me))  # older than the fresh one: not the latest
    stale = Catalog(tmp_path / "s.sqlite")
    stale.put_calibration(_record(created=_created(9), instrument=me))
    use = use_latest_calibration(inst, stale, expansion_volume="small", gas="helium", fill_target=1.3e5,
                                 policy=policy)
    assert len(use.warnings) == 1 and "days old" in use.warnings[0] and AGE_RULE in use.warnings[0]
    use = use_latest_calibration(inst, stale, expansion_volume="small", gas="helium",
                                 policy=CalibrationPolicy(max_age=30 * 86400))
    assert use.warnings == []
    # only a nitrogen calibration: not used by itself (calibrations are bound to their gas) ...
    n2 = Catalog(tmp_path / "n.sqlite")
    cid = n2.put_calibration(_record(gas="nitrogen", created=_created(0.1), instrument=me))
    use = use_latest_calibration(inst, n2, expansion_volume="small", gas="helium", policy=policy)
    assert use.record is None and use.warnings[0].startswith("UNCALIBRATED")
    # ... only when the operator chooses it for helium, and then with a warning that names both gases
    n2.choose_calibration(cid, me, gas="helium")
    use = use_latest_calibration(inst, n2, expansion_volume="small", gas="helium", policy=policy)
    assert use.record is not None and use.record.id == cid
    assert any("made in nitrogen" in w and "measures in helium" in w for w in use.warnings)


def test_policy_from_environment() -> None:
    p = CalibrationPolicy.from_env({"PYCNOCTL_CAL_MAX_AGE": "1 day", "PYCNOCTL_CAL_FILL_TOLERANCE": "2 %",
                                    "PYCNOCTL_CAL_TEMPERATURE_TOLERANCE": "0.5 K"})
    assert (p.max_age, p.fill_tolerance, p.temperature_tolerance) == (86400.0, pytest.approx(0.02), 0.5)
    assert CalibrationPolicy.from_env({}) == CalibrationPolicy()


def test_stale_calibration_warning_lands_in_the_run(tmp_path: Path) -> None:
    (tmp_path / "meas.yaml").write_text(MEAS_SEQ)
    cat = Catalog(tmp_path / "catalog.sqlite")
    inst = build_sim_instrument(None)
    cid = cat.put_calibration(_record(created=_created(10), instrument=inst.identity))
    s = execute(prepare(RunRequest(tmp_path / "meas.yaml"), inst), Controller(inst), root=tmp_path / "runs",
                catalog=cat)
    assert s["calibration"]["record_id"] == cid
    assert any("days old" in w for w in s["warnings"])
    events = (tmp_path / "runs" / s["run_id"] / "events.jsonl").read_text()
    assert "days old" in events


def test_calibrate_verb_on_the_simulator(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "cal.yaml").write_text(CAL_SEQ)
    rc = cli.main(["calibrate", "--sim", "--sphere", SPHERE, "--expansion-volume", "small", "--sequence",
                   str(tmp_path / "cal.yaml"), "--data", str(tmp_path), "--json", "--operator", "tech-c"])
    import json

    out = json.loads(capsys.readouterr().out)
    assert rc == 0 and out["status"] == "stored"
    assert out["volumes"][0]["vc_cm3"] == pytest.approx(12.0, abs=3 * out["volumes"][0]["u_vc_cm3"])
    assert cli.main(["calibrate", "--sim", "--sphere", "D=oops", "--data", str(tmp_path)]) == 2


def test_the_shipped_calibration_sequence_serves_any_volume_names(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    """The shipped sequence names no expansion volume (it once said 'small' and so refused every other
    build) and settles and vents as grain-volume does, so their settle biases cancel."""
    from pycnoctl.controller.jobs.calibration_use import settle_rules
    from pycnoctl.controller.run.sequence import load_sequence, resolve_sequence
    from pycnoctl.sim.config import DEFAULT_CONFIG

    cal, meas = load_sequence(resolve_sequence("calibration")), load_sequence(resolve_sequence("grain-volume"))
    assert settle_rules(cal) == settle_rules(meas) and cal.vent.time == meas.vent.time
    sim = tmp_path / "bulbs.yaml"
    sim.write_text(DEFAULT_CONFIG.read_text(encoding="utf-8").replace("small", "bulb_a").replace("large", "bulb_b"))
    rc = cli.main(["calibrate", "--sim", str(sim), "--sphere", SPHERE, "--expansion-volume", "bulb_a",
                   "--data", str(tmp_path), "--json"])
    import json

    out = json.loads(capsys.readouterr().out)
    assert rc == 0 and out["status"] == "stored" and out["volumes"][0]["expansion_volume"] == "bulb_a"


def test_one_certificate_twice_and_a_sphere_larger_than_the_cell_are_refused_before_any_step():
    """Found by a sweep: the same sphere spec given twice lowered u(Vc) from 0.00288 to 0.00205 cm3 with no
    word (its certificate's error counted as two independent ones); a 40 mm sphere in a 12 cm3 cell was
    refused only by the simulator's own 'solid plus pore volume must be smaller than the cell volume'."""
    from pycnoctl.controller.cli.main import main as cli_main
    from pycnoctl.controller.jobs.calibration import parse_sphere, sphere_problem

    twice = [parse_sphere("V=5 cm3,u=0.001 cm3", "sphere 1"), parse_sphere("V=5 cm3,u=0.001 cm3", "sphere 2")]
    assert "sphere 2 repeats sphere 1's certificate" in (sphere_problem(twice, 12e-6) or "")
    respelt = [parse_sphere("V=5 cm3,u=0.001 cm3", "sphere 1"), parse_sphere("V=5000 mm3,u=1 mm3", "sphere 2")]
    assert "repeats" in (sphere_problem(respelt, 12e-6) or "")  # one certificate in other units
    named = [parse_sphere("V=5 cm3,u=0.001 cm3,name=ball A", "sphere 1"),
             parse_sphere("V=5 cm3,u=0.001 cm3,name=ball B", "sphere 2")]
    assert sphere_problem(named, 12e-6) is None  # two spheres that share a certificate value, named apart
    big = [parse_sphere("D=40 mm,u=0.002 mm", "sphere 1")]  # 33.5 cm3 (pi d^3 / 6)
    assert "does not fit the sample cell (12 cm3)" in (sphere_problem(big, 12e-6) or "")
    assert cli_main(["calibrate", "--sim", "--sphere", "D=40 mm,u=0.002 mm", "--yes"]) == 2
