"""Catalog: pragmas, run life cycle, queries, calibrations, queue, strict IDs, SIGINT deferral.

Pragma meanings: SQLite documentation (PRAGMA journal_mode, PRAGMA synchronous: FULL = 2).
"""

from __future__ import annotations

import datetime as dt
import signal
import sqlite3
import threading

import pytest

from pycnoctl.controller.record.catalog import (
    SCHEMA_VERSION,
    CalibrationRecord,
    Catalog,
    CatalogError,
    is_run_id,
)


@pytest.fixture
def cat(tmp_path):
    c = Catalog(tmp_path / "catalog.sqlite")
    yield c
    c.close()


def test_wal_full_and_schema_version(cat, tmp_path):
    assert cat._read("PRAGMA journal_mode")[0][0] == "wal"
    assert cat._read("PRAGMA synchronous")[0][0] == 2  # FULL
    assert cat.schema_version() == SCHEMA_VERSION
    assert cat.integrity_check() == "ok"


def test_refuses_a_newer_schema(tmp_path):
    path = tmp_path / "c.sqlite"
    Catalog(path).close()
    con = sqlite3.connect(path)
    con.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION + 1,))
    con.commit()
    con.close()
    with pytest.raises(CatalogError, match="newer"):
        Catalog(path)


def test_run_ids_are_issued_and_strict(cat):
    rid = cat.new_run_id()
    assert is_run_id(rid)
    for bad in ("R20251301T000000Z-abcdef",  # month 13
                "R20250101T000000Z-ABCDEF", "R20250101T000000Z-abcde", "../R20250101T000000Z-abcdef",
                "R20250101T000000Z-abcdef\n", 42, None, ""):
        assert not is_run_id(bad), bad
    with pytest.raises(CatalogError):
        cat.create_run(kind="measurement", run_id="run-1")
    with pytest.raises(CatalogError):
        cat.create_run(kind="measurement", folder="../../etc")
    assert cat.get_run("../../etc/passwd") is None


def test_run_life_cycle(cat):
    rid = cat.create_run(kind="measurement", sample_id="basalt-03", sequence_name="standard")
    r = cat.get_run(rid)
    assert r.status == "queued" and r.folder == rid and r.started is None
    cat.update_status(rid, "running")
    assert cat.get_run(rid).started is not None
    cat.add_cycle(rid, 1, 150e3, 80e3, 5.01e-6, True)
    cat.add_cycle(rid, 2, 150e3, 80.1e3, 5.02e-6, True)
    cat.add_cycle(rid, 2, 150e3, 80.1e3, 5.02e-6, False)  # revised
    assert [(c.idx, c.kept) for c in cat.get_cycles(rid)] == [(1, True), (2, False)]
    cat.finish_run(rid, "completed", volume_m3=5.01e-6, u_volume_m3=2e-9, density=2.65e3, mass=13.3e-3)
    r = cat.get_run(rid)
    assert r.status == "completed" and r.ended is not None and r.density == 2.65e3
    with pytest.raises(CatalogError):
        cat.update_status(rid, "running")  # terminal is final
    with pytest.raises(CatalogError):
        cat.finish_run(rid, "running")
    with pytest.raises(CatalogError):
        cat.update_status(cat.new_run_id(), "running")  # unknown run


def test_list_runs_filters(cat):
    ids = [cat.create_run(kind="measurement", sample_id="quartz" if i % 2 else "clay") for i in range(6)]
    cat.update_status(ids[0], "running")
    cat.update_status(ids[0], "fault", "rise_rate")
    assert {r.id for r in cat.list_runs(sample="quartz")} == set(ids[1::2])
    assert [r.id for r in cat.list_runs(status="fault")] == [ids[0]]
    assert len(cat.list_runs(status=["queued", "fault"])) == 6
    assert len(cat.list_runs(limit=2)) == 2
    future = dt.datetime.now(dt.UTC) + dt.timedelta(days=1)
    past = dt.datetime.now(dt.UTC) - dt.timedelta(days=1)
    assert cat.list_runs(since=future) == []
    assert len(cat.list_runs(since=past, until=future)) == 6
    assert cat.list_runs()[0].created >= cat.list_runs()[-1].created
    with pytest.raises(CatalogError):
        cat.list_runs(status="done")


def test_mark_interrupted_on_startup_never_resumes(tmp_path):
    path = tmp_path / "c.sqlite"
    c = Catalog(path)
    a = c.create_run(kind="measurement", status="running")
    b = c.create_run(kind="measurement")
    c.close()
    c2 = Catalog(path)  # the daemon restarts
    assert c2.mark_interrupted_on_startup() == [a]
    assert c2.get_run(a).status == "interrupted" and "not resumed" in c2.get_run(a).message
    assert c2.get_run(b).status == "queued"
    assert c2.mark_interrupted_on_startup() == []
    c2.close()


def test_an_interrupted_run_ends_when_its_trace_was_last_written(tmp_path):
    """Found by a sweep: a run interrupted by a killed daemon got the restart's time as its end (the
    restart may come days later).  Its trace file's time is taken; without a trace, the restart's."""
    import os

    c = Catalog(tmp_path / "c.sqlite")
    a = c.create_run(kind="measurement", status="running")
    b = c.create_run(kind="measurement", status="running")
    (tmp_path / "runs" / a).mkdir(parents=True)
    trace = tmp_path / "runs" / a / "trace.csv"
    trace.write_text("t,state\n0.0,fill\n")
    last = dt.datetime(2026, 11, 28, 17, 30, 5, tzinfo=dt.UTC)
    os.utime(trace, (last.timestamp(), last.timestamp()))
    before = dt.datetime.now(dt.UTC)
    assert c.mark_interrupted_on_startup(runs_dir=tmp_path / "runs") == [a, b]
    assert c.get_run(a).ended.startswith("2026-11-28T17:30:05")
    assert c.get_run(b).ended >= before.strftime("%Y-%m-%dT%H:%M:%S")  # no folder: the restart's time
    c.close()


def test_calibrations(cat):
    older = cat.put_calibration(CalibrationRecord(
        "small", "He", 12.0e-6, 8.0e-6, 130e3, 296.0, "tech-a",
        cov=[[1e-20, 0], [0, 1e-20]], spheres=[{"d_m": 0.0254}], residuals=[0.1], payload={"n": 3},
        created="2025-01-01T00:00:00.000000Z"))
    newer = cat.put_calibration(CalibrationRecord("small", "He", 12.1e-6, 8.1e-6))
    cat.put_calibration(CalibrationRecord("large", "He", 12.0e-6, 20e-6))
    got = cat.get_calibration(older)
    assert got.cov == [[1e-20, 0], [0, 1e-20]] and got.spheres == [{"d_m": 0.0254}]
    assert cat.latest_calibration("small", "He").id == newer
    assert cat.latest_calibration("small", "N2") is None
    with pytest.raises(ValueError):  # NaN is not JSON
        cat.put_calibration(CalibrationRecord("small", "He", 1.0, 1.0, cov=[float("nan")]))
    rid = cat.create_run(kind="measurement", calibration_id=newer)
    assert cat.get_run(rid).calibration_id == newer


def test_queue(cat):
    ids = [cat.create_run(kind="measurement") for _ in range(3)]
    for i, rid in enumerate(ids):
        cat.queue_push(rid, {"sequence": "standard", "n": i})
    assert [e.run_id for e in cat.queue_list()] == ids
    assert cat.queue_remove(ids[1]) and not cat.queue_remove(ids[1])
    head = cat.queue_pop()
    assert head.run_id == ids[0] and head.request == {"sequence": "standard", "n": 0}
    assert cat.queue_pop().run_id == ids[2]
    assert cat.queue_pop() is None
    with pytest.raises(sqlite3.IntegrityError):
        cat.queue_push("R20250101T000000Z-000000", {})  # not a run: foreign key


def test_sigint_during_a_commit_is_deferred_until_after_it(cat):
    # Python's own Ctrl-C handler, whatever this process inherited: a shell starts a background job
    # with SIGINT ignored, and an ignored interrupt is rightly dropped (the catalog restores SIG_IGN)
    before = signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        _deferred_then_delivered(cat)
    finally:
        signal.signal(signal.SIGINT, before)


def _deferred_then_delivered(cat):
    rid = cat.new_run_id()
    seen = []

    def fire():
        signal.raise_signal(signal.SIGINT)  # arrives while the transaction is open
        seen.append("raised")

    cat._before_commit = fire
    with pytest.raises(KeyboardInterrupt):
        cat.create_run(kind="measurement", run_id=rid)
    cat._before_commit = None
    assert seen == ["raised"]  # the hook ran to completion: the interrupt was held
    assert cat.get_run(rid) is not None  # and the write committed
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler


def test_one_catalog_from_many_threads(cat):
    errors = []

    def worker():
        try:
            for _ in range(20):
                rid = cat.create_run(kind="measurement")
                cat.update_status(rid, "running")
        except Exception as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=worker) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert len(cat.list_runs(status="running", limit=1000)) == 80


def test_a_damaged_catalog_is_named_and_the_way_out_said(tmp_path):
    # found by a sweep: 'failed: DatabaseError: database disk image is malformed' with no file named
    import sqlite3 as _sqlite3

    from pycnoctl.controller.record.catalog import CatalogError, _opening_problem

    good = tmp_path / "good.sqlite"
    with Catalog(good) as cat:
        for i in range(40):
            cat.create_run(kind="measurement", sample_id=f"AL-{i:04d}", sequence_name="quick-demo")
    cut = tmp_path / "catalog.sqlite"
    cut.write_bytes(good.read_bytes()[:3000])
    with pytest.raises(CatalogError, match=r"is damaged \(.*\); every run's record is still in its folder") as exc:
        Catalog.for_reading(cut)
    assert str(cut) in str(exc.value)
    locked = _sqlite3.OperationalError("database is locked")
    assert "is locked by another process" in str(_opening_problem(cut, locked))
    assert _opening_problem(cut, _sqlite3.OperationalError("database or disk is full")) is None  # a storage fault



def test_a_damaged_catalog_is_one_line_and_exit_2_for_a_reading_verb(tmp_path, capsys):
    from pycnoctl.controller.cli.main import main

    assert main(["run", "quick-demo", "--sim", "--data", str(tmp_path), "--quiet"]) == 0
    path = tmp_path / "catalog.sqlite"
    raw = path.read_bytes()
    for extra in ("-wal", "-shm"):
        (tmp_path / f"catalog.sqlite{extra}").unlink(missing_ok=True)
    path.write_bytes(raw[:2048] + b"\0" * 100)
    capsys.readouterr()
    assert main(["runs", "--data", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "is damaged" in err[0] and str(path) in err[0]
