"""API contract: what each endpoint returns, against an in-process daemon on the fast simulator.

The simulator's clock runs as fast as the CPU allows here, so a whole quick-demo run takes well
under a second of wall time.  Physical checks compare with the simulator's own truth (its
configured solid volume), which is the outside reference for a measurement on the simulator.
"""

from __future__ import annotations

import importlib.util
import json
import time
import warnings
from collections.abc import Iterator
from pathlib import Path

import pytest

with warnings.catch_warnings():  # starlette 1.x nags about httpx; the client works
    warnings.simplefilter("ignore", DeprecationWarning)
    from starlette.testclient import TestClient

from pycnoctl.controller.record.catalog import is_run_id
from pycnoctl.controller.record.runfolder import load_run
from pycnoctl.controller.run.sequence import list_shipped
from pycnoctl.controller.service.api import close_workers, create_app
from pycnoctl.controller.service.daemon import Daemon
from pycnoctl.controller.service.security import Policy
from pycnoctl.drivers.simulated import build_sim_instrument

BASE = "http://127.0.0.1:8765"


@pytest.fixture
def daemon(tmp_path: Path) -> Iterator[Daemon]:
    inst = build_sim_instrument(None)
    d = Daemon(inst, tmp_path / "data")
    d.start()
    yield d
    d.stop()
    d.catalog.close()
    inst.close()


@pytest.fixture
def client(daemon: Daemon) -> Iterator[TestClient]:
    app = create_app(daemon, Policy(port=8765))
    with TestClient(app, base_url=BASE) as c:
        yield c
    close_workers(app)


def wait_status(client: TestClient, run_id: str, want: set[str], timeout: float = 20.0) -> dict:
    t_end = time.monotonic() + timeout
    while time.monotonic() < t_end:
        r = client.get(f"/api/runs/{run_id}").json()
        if r["status"] in want:
            return r
        time.sleep(0.05)
    raise AssertionError(f"run {run_id} did not reach {want}: {r['status']}")


def test_status_describes_the_instrument_and_shows_the_safe_state(client: TestClient, daemon: Daemon) -> None:
    s = client.get("/api/status").json()
    assert s["activity"] == "idle" and s["state"] == "idle"
    inst = s["instrument"]
    roles = daemon.instrument.roles
    assert inst["roles"]["inlet"] == roles.inlet and inst["roles"]["vent"] == roles.vent
    assert inst["roles"]["expansion"] == dict(roles.expansion)
    # the clean simulator config: 12 cm^3 cell, 8 and 20 cm^3 expansion volumes (sim/configs/clean.yaml)
    assert inst["chambers"]["cell_cm3"] == pytest.approx(12.0)
    assert inst["chambers"]["expansion_cm3"] == pytest.approx({"small": 8.0, "large": 20.0})
    # safe state (safety.md): inlet closed, vent and every expansion valve open - as the daemon reports it
    time.sleep(0.1)
    s = client.get("/api/status").json()
    assert s["valves"] == roles.safe_state()
    assert s["interlock"] == {"latched": False}
    assert s["queue"] == {"length": 0, "paused": False, "paused_reason": None}
    assert s["pressure"]["valid"] == "valid"
    assert s["loop"]["running"] is True


def test_a_queued_run_completes_with_the_simulators_volume(client: TestClient, daemon: Daemon) -> None:
    r = client.post("/api/runs", json={"sequence": "quick-demo", "sample_id": "TILE-07", "mass": "10.0 g",
                                       "operator": "demo"})
    assert r.status_code == 201, r.text
    out = r.json()
    rid = out["run_id"]
    assert is_run_id(rid) and r.headers["location"] == f"/api/runs/{rid}"
    row = wait_status(client, rid, {"completed", "fault", "aborted"})
    assert row["status"] == "completed", row
    truth = daemon.instrument.extras["sim"].config.sample.solid_volume * 1e6  # cm^3, the simulator's truth
    # the measured volume agrees with the truth within its expanded uncertainty (GUM, k=2)
    assert abs(row["volume_cm3"] - truth) <= row["volume_u_cm3"]
    assert row["summary"]["density_g_cm3"] == pytest.approx(10.0 / row["volume_cm3"], rel=1e-9)
    csv = client.get(f"/api/runs/{rid}/trace.csv")
    assert csv.status_code == 200 and csv.headers["content-type"].startswith("text/csv")
    assert csv.text.splitlines()[0].startswith("t,state,cycle")
    stored = load_run(daemon.data / "runs" / rid)
    assert stored.n_samples == len(csv.text.splitlines()) - 1
    summ = client.get(f"/api/runs/{rid}/summary.json").json()
    assert summ["run_id"] == rid and summ["results"]["status"] == "completed"
    listed = client.get("/api/runs", params={"sample": "TILE-07"}).json()["runs"]
    assert [x["run_id"] for x in listed] == [rid]
    assert client.get("/api/runs", params={"status": "fault"}).json()["runs"] == []
    last = client.get("/api/status").json()["last_run"]
    assert last["run_id"] == rid and last["status"] == "completed"


def test_sequence_text_is_accepted_and_problems_are_positioned(client: TestClient) -> None:
    text = list_shipped()["quick-demo"].read_text(encoding="utf-8").replace("count: 3", "count: 2")
    r = client.post("/api/runs", json={"sequence_text": text, "sample_id": "TEXT-1"})
    assert r.status_code == 201, r.text
    row = wait_status(client, r.json()["run_id"], {"completed", "fault", "aborted"})
    assert row["status"] == "completed"
    bad = text.replace("count: 2", "count: lots")
    r = client.post("/api/runs", json={"sequence_text": bad})
    assert r.status_code == 422
    problems = r.json()["problems"]
    line = next(i for i, ln in enumerate(bad.splitlines(), 1) if "count: lots" in ln)
    assert any(p.startswith(f"<submitted>:{line}:") for p in problems), problems


def test_a_settle_window_too_short_for_the_sample_period_is_refused_at_submit(client: TestClient,
                                                                            daemon: Daemon) -> None:
    """The daemon prepares a run as the command line does: a window holding fewer than three samples at
    the instrument's period is refused, positioned, before anything is queued (was: 500 Internal Server
    Error, a ZeroDivisionError in prepare's advisor arithmetic for quick-demo's automatic volume choice
    under a fixed max_drift; with a named volume, queued and faulted after max_time with 'drift nan')."""
    text = list_shipped()["quick-demo"].read_text(encoding="utf-8").replace("  window: 4 s", "  window: 0.05 s")
    r = client.post("/api/runs", json={"sequence_text": text})
    assert r.status_code == 422, r.text
    line = next(i for i, ln in enumerate(text.splitlines(), 1) if "window: 0.05 s" in ln)
    [problem] = r.json()["problems"]
    assert problem.startswith(f"<submitted>:{line}:3: settle.window 0.05 s holds 1 sample at this instrument's "
                              "sample period of 0.1 s;") and problem.endswith("make the window at least 0.2 s")
    assert daemon.catalog.list_runs() == [] and daemon.catalog.queue_list() == []


@pytest.mark.parametrize("how", ["name", "text"])
def test_a_calibration_sequence_is_refused_as_a_run(client: TestClient, daemon: Daemon, how: str) -> None:
    """Found by a sweep: submitted as a run it measured the empty cell with the nominal volumes (10 cycles) and
    stored no calibration, while the operator may have believed the instrument calibrated."""
    body = {"sequence": "calibration"} if how == "name" else \
        {"sequence_text": list_shipped()["calibration"].read_text(encoding="utf-8")}
    r = client.post("/api/runs", json=body)
    assert r.status_code == 422, r.text
    assert "calibration sequence (kind: calibrate): run it with pycnoctl calibrate" in r.json()["error"]
    assert r.json().get("field") == "sequence"
    assert daemon.catalog.list_runs() == [] and daemon.catalog.queue_list() == []
    names = client.get("/api/sequences").json()["sequences"]
    assert "calibration" not in names and {"grain-volume", "quick-demo"} <= set(names)  # nor offered as one


@pytest.mark.parametrize("name", ["/etc/passwd", "../sequences/quick-demo", "quick-demo/../x", "catalog.sqlite",
                                  "no-such-sequence"])
def test_sequence_names_are_never_paths(client: TestClient, name: str) -> None:
    r = client.post("/api/runs", json={"sequence": name})
    assert r.status_code == 422
    assert "no shipped sequence" in r.json()["error"]


def test_bad_requests_are_refused_before_anything_is_queued(client: TestClient, daemon: Daemon) -> None:
    # 400: the request breaks the published schema (a mass is positive); 422: the daemon refuses its content
    for body, code in [({"sequence": "quick-demo", "mass": "-3 g"}, 400), ({"sequence": "quick-demo", "mass": 0}, 400),
                       ({"sequence": "quick-demo", "mass": True}, 400), ({"sequence": None, "sequence_text": "x"}, 400),
                       ({"sequence": "quick-demo", "mass": "3 s"}, 400),
                       ({"sequence": "quick-demo", "colour": "red"}, 400), ({}, 422),
                       ({"sequence": "quick-demo", "sequence_text": "x"}, 422), ([1, 2], 400),
                       ({"sequence": "quick-demo", "expansion_volume": "huge"}, 422)]:
        r = client.post("/api/runs", json=body)
        assert r.status_code == code, (body, r.text)
    assert daemon.catalog.list_runs() == []
    # the refusal names its field, so a form can put it beside the box (a sweep: it had none)
    r = client.post("/api/runs", json={"sequence": "quick-demo", "expansion_volume": "huge"})
    assert r.json().get("field") == "expansion_volume" and "unknown expansion volume 'huge'" in r.json()["error"]


def test_queue_removal_and_pause(client: TestClient, daemon: Daemon) -> None:
    assert client.post("/api/queue/pause").json()["paused"] is True
    rid = client.post("/api/runs", json={"sequence": "quick-demo"}).json()["run_id"]
    q = client.get("/api/queue").json()
    assert [i["run_id"] for i in q["items"]] == [rid] and q["paused"]
    time.sleep(0.2)
    assert client.get(f"/api/runs/{rid}").json()["status"] == "queued"  # paused: not started
    assert client.delete(f"/api/queue/{rid}").status_code == 200
    gone = client.get(f"/api/runs/{rid}").json()
    assert gone["status"] == "cancelled" and "before it started" in gone["message"]  # not 'aborted': it never ran
    assert client.get(f"/api/runs/{rid}/summary.json").status_code == 404  # and it has no record
    assert client.delete(f"/api/queue/{rid}").status_code == 409
    assert client.get("/api/queue").json()["items"] == []
    rid2 = client.post("/api/runs", json={"sequence": "quick-demo"}).json()["run_id"]
    rid3 = client.post("/api/runs", json={"sequence": "quick-demo"}).json()["run_id"]
    # the positions are the order they start in, from 1, whatever came and went before (a sweep: the only
    # waiting run showed as 15)
    assert [(i["position"], i["run_id"]) for i in client.get("/api/queue").json()["items"]] == [(1, rid2), (2, rid3)]
    assert client.delete(f"/api/queue/{rid3}").status_code == 200
    assert client.post("/api/queue/resume").json()["paused"] is False
    assert wait_status(client, rid2, {"completed"})["status"] == "completed"


def test_reset_refused_with_reason_while_the_condition_lasts(client: TestClient, daemon: Daemon) -> None:
    assert client.post("/api/abort").status_code == 409  # nothing runs
    r = client.post("/api/reset")
    assert r.status_code == 200 and r.json()["message"] == "nothing was latched"
    # trip an interlock from inside the control thread (as a failing check would), with the sensor gone
    bench = daemon.instrument.extras["sim"]
    bench.inject({"kind": "disconnect", "device": "pressure"})
    daemon.call(lambda c: c.monitor.trip_external("device_error", c.instrument.clock.now(), "test trip"))
    s = client.get("/api/status").json()
    assert s["interlock"]["latched"] and s["interlock"]["kind"] == "device_error"
    assert s["activity"] == "tripped"
    r = client.post("/api/reset")
    assert r.status_code == 409
    assert "not valid" in r.json()["reason"]
    # a queued run does not start while latched
    rid = client.post("/api/runs", json={"sequence": "quick-demo"}).json()["run_id"]
    time.sleep(0.2)
    assert client.get(f"/api/runs/{rid}").json()["status"] == "queued"
    assert client.delete(f"/api/queue/{rid}").status_code == 200


def test_reset_accepted_once_the_condition_is_gone(client: TestClient, daemon: Daemon) -> None:
    daemon.call(lambda c: c.monitor.trip_external("device_error", c.instrument.clock.now(), "test trip"))
    time.sleep(0.05)
    r = client.post("/api/reset")
    assert r.status_code == 200 and r.json()["message"] == "cleared device_error"
    assert client.get("/api/status").json()["interlock"] == {"latched": False}


def test_openapi_document_and_docs_page(client: TestClient) -> None:
    spec = client.get("/api/openapi.json").json()
    assert spec["openapi"].startswith("3.")
    for path in ("/api/status", "/api/runs", "/api/runs/{run_id}", "/api/runs/{run_id}/trace.csv",
                 "/api/runs/{run_id}/summary.json", "/api/runs/{run_id}/report", "/api/queue/{run_id}",
                 "/api/abort", "/api/reset", "/api/events"):
        assert path in spec["paths"], path
    assert "post" in spec["paths"]["/api/runs"] and "delete" in spec["paths"]["/api/queue/{run_id}"]
    page = client.get("/api/docs")
    assert page.status_code == 200 and "/api/reset" in page.text


def test_report_endpoint(client: TestClient, daemon: Daemon) -> None:
    rid = client.post("/api/runs", json={"sequence": "quick-demo"}).json()["run_id"]
    wait_status(client, rid, {"completed"})
    r = client.get(f"/api/runs/{rid}/report")
    if importlib.util.find_spec("pycnoctl.controller.record.report") is None:
        assert r.status_code == 404 and "not available" in r.json()["error"]
    else:
        assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")


def test_report_is_rendered_out_of_the_daemon_process(client: TestClient, daemon: Daemon,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    # The render must not run in the daemon's process (it would hold the GIL away from the control
    # loop): break it here, and the report still comes, from the worker process.
    import pycnoctl.controller.record.report as report_mod
    import pycnoctl.controller.service.api as api_mod

    def in_process(*a: object, **k: object) -> None:
        raise AssertionError("report rendered in the daemon's process")

    monkeypatch.setattr(report_mod, "render_report", in_process)
    monkeypatch.setattr(api_mod, "REPORT_WAIT", 0.0)  # answer at once: 202 while the worker renders
    rid = client.post("/api/runs", json={"sequence": "quick-demo"}).json()["run_id"]
    wait_status(client, rid, {"completed"})
    first = client.get(f"/api/runs/{rid}/report")
    assert first.status_code == 202 and first.headers["retry-after"] == "2"
    t_end = time.monotonic() + 60.0
    r = first
    while r.status_code == 202 and time.monotonic() < t_end:
        time.sleep(0.2)
        r = client.get(f"/api/runs/{rid}/report")
    assert r.status_code == 200 and "skeletal volume" in r.text


def test_dashboard_and_static_files_are_served_locally(client: TestClient) -> None:
    page = client.get("/")
    assert page.status_code == 200 and "/static/app.js" in page.text
    assert "http://" not in page.text and "https://" not in page.text  # no external assets
    for name in ("app.js", "style.css"):
        r = client.get(f"/static/{name}")
        assert r.status_code == 200
        assert "https://" not in r.text and "//cdn" not in r.text
    tr = client.get("/api/trace").json()
    assert len(tr["t"]) == len(tr["gauge_pa"])
    assert "quick-demo" in client.get("/api/sequences").json()["sequences"]


def test_events_are_valid_json_with_no_nan(daemon: Daemon, client: TestClient) -> None:
    client.post("/api/runs", json={"sequence": "quick-demo"})
    time.sleep(0.5)
    items, _ = daemon.bus.since(0, limit=5000)
    kinds = {k for _, k, _ in items}
    assert {"queue", "run_started", "state", "sample", "cycle_done", "run_finished"} <= kinds
    for _, _, data in items:
        json.dumps(data, allow_nan=False)


def test_states_serve_the_one_vocabulary(client: TestClient) -> None:
    from pycnoctl.controller.domain.states import RunState

    r = client.get("/api/states")
    assert r.status_code == 200
    states = r.json()
    assert [x["name"] for x in states] == [s.value for s in RunState]
    fill = next(x for x in states if x["name"] == "fill")
    assert fill == {"name": "fill", "label": RunState.FILL.look.label, "colour": RunState.FILL.look.colour,
                    "terminal": False}
    spec = client.get("/api/openapi.json").json()
    assert spec["paths"]["/api/states"]["get"]["responses"]["200"]["content"]["application/json"]["schema"]["type"] \
        == "array"


def test_refusals_are_declared_and_shaped_alike(client: TestClient) -> None:
    spec = client.get("/api/openapi.json").json()
    run = spec["paths"]["/api/runs/{run_id}"]["get"]
    assert {"400", "404"} <= set(run["responses"])
    assert run["parameters"][0]["schema"]["pattern"].startswith("^R")
    limit = next(p for p in spec["paths"]["/api/runs"]["get"]["parameters"] if p["name"] == "limit")
    assert limit["schema"]["minimum"] == 1 and limit["schema"]["maximum"] == 1000
    assert "oneOf" in spec["components"]["schemas"]["RunRequest"]
    for reply, code in [(client.get("/api/runs/R20250101T000000Z-abcdef"), 404), (client.get("/api/runs?limit=0"), 400),
                       (client.get("/api/trace?seconds=null"), 400), (client.get("/api/nowhere"), 404)]:
        assert reply.status_code == code and set(reply.json()) >= {"error", "status"}
    r = client.request("OPTIONS", "/api/runs")
    assert r.status_code == 405 and r.headers["allow"] == "GET, POST"
    r = client.delete("/api/queue/pause")
    assert r.status_code == 405 and r.headers["allow"] == "POST"


@pytest.mark.parametrize("text", ["- " * 400 + "x\n", "[" * 400 + "]" * 400 + "\n", "a: " * 400 + "b\n"])
def test_deeply_nested_sequence_text_is_refused_and_leaves_no_file(client: TestClient, daemon: Daemon,
                                                                   text: str) -> None:
    r = client.post("/api/runs", json={"sequence_text": text})
    assert r.status_code == 422, r.text
    assert list((daemon.data / "sequences").iterdir()) == []
    assert daemon.catalog.list_runs() == []


def test_the_operator_sees_calibration_warnings_and_provenance(client: TestClient, daemon: Daemon) -> None:
    """The current run carries the calibration it uses (here none: UNCALIBRATED, with the stated nominal
    u) and its warnings as they come; the last run says whether it converged, was calibrated and
    simulated; the instrument says it is simulated; the trace serves each point's state."""
    s = client.get("/api/status").json()
    assert s["instrument"]["simulated"] is True and s["instrument"]["identity"].startswith("sim:")
    seen: dict = {}
    body = {"sequence": "quick-demo", "sample_id": "P-1", "mass": "0.1 g"}
    rid = client.post("/api/runs", json=body).json()["run_id"]
    t_end = time.monotonic() + 20
    while time.monotonic() < t_end and not seen.get("warnings"):
        cur = client.get("/api/status").json()["current_run"]
        if cur and cur["run_id"] == rid:
            seen = cur
        time.sleep(0.02)
    assert seen, "the run was never seen running"
    assert seen["calibration"]["uncalibrated"] is True and seen["calibration"]["nominal_u"] == pytest.approx(0.005)
    assert any(w.startswith("UNCALIBRATED") for w in seen["warnings"])
    done = wait_status(client, rid, {"completed"})
    last = client.get("/api/status").json()["last_run"]
    assert last["run_id"] == rid and last["calibrated"] is False and last["simulated"] is True
    assert "converged" in last and last["calibration_id"] is None
    # 0.1 g of a 5 cm^3 solid: 0.02 g/cm^3, below any solid's density: a warning on the record
    assert any("outside any solid's" in w for w in done["summary"]["warnings"])
    assert any("outside any solid's" in w for w in last["warnings"])
    assert set(done["links"]) == {"trace.csv", "summary.json", "report"}
    tr = client.get("/api/trace?seconds=600").json()
    names = {st["name"] for st in client.get("/api/states").json()}
    # at most 10 points a wall second: this fast simulator leaves few, but each carries its state
    assert len(tr["state"]) == len(tr["t"]) and set(tr["state"]) <= names and set(tr["state"]) - {"idle"}


def _report(client: TestClient, rid: str) -> object:
    r = client.get(f"/api/runs/{rid}/report")
    t_end = time.monotonic() + 60.0
    while r.status_code == 202 and time.monotonic() < t_end:  # the worker is still rendering
        time.sleep(0.2)
        r = client.get(f"/api/runs/{rid}/report")
    return r


def test_a_damaged_record_is_named_without_server_paths(client: TestClient, daemon: Daemon) -> None:
    rid = client.post("/api/runs", json={"sequence": "quick-demo"}).json()["run_id"]
    wait_status(client, rid, {"completed"})
    folder = daemon.data / "runs" / rid
    where = str(daemon.data.resolve())

    (folder / "trace.csv").write_text("t,gauge,not,the,header\n1,2,3,4,5\n")
    r = _report(client, rid)
    assert r.status_code == 409, r.text
    body = r.json()
    assert rid in body["error"] and "trace.csv is damaged" in body["error"]
    assert body["problems"] == ["trace.csv: header does not match meta.json trace_columns"]
    assert where not in r.text and str(daemon.data) not in r.text

    (folder / "trace.csv").unlink()
    r = _report(client, rid)
    assert r.status_code == 200 and "trace.csv is missing" in r.text

    (folder / "summary.json").write_text('{"results": {"status": "compl')
    r = _report(client, rid)
    assert r.status_code == 409 and "summary.json is damaged" in r.json()["error"]
    assert where not in r.text and str(daemon.data) not in r.text
    run = client.get(f"/api/runs/{rid}").json()
    assert run.get("summary") is None
    assert run["record_problems"][0].startswith("summary.json is damaged: not JSON")

    # JSON, but not shaped as a summary (a sweep: the run's answer and the report were 500s)
    for doc, says in [('{"results": 5}', "'results' is not a JSON object"),
                      ('{"results": {"cycles": 5}}', "'results.cycles' is not a list"),
                      ('{"results": {"volume_cm3": "x"}}', "'results.volume_cm3' is not a number")]:
        (folder / "summary.json").write_text(doc)
        r = _report(client, rid)
        assert r.status_code == 409 and "summary.json is damaged" in r.json()["error"], (doc, r.text)
        assert says in " ".join(r.json().get("problems") or [r.json()["error"]]), (doc, r.text)
        got = client.get(f"/api/runs/{rid}")
        assert got.status_code == 200, got.text  # the run itself is always shown
        if doc == '{"results": 5}':
            assert got.json().get("summary") is None and says in got.json()["record_problems"][0]
