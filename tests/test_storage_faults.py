"""Storage faults as first-class: a write that fails anywhere in a run, a power loss, read-only media.

The N-th-write injection (sim.storage.IoPlan, as SQLite's own tests do it) first counts the writes of
one clean quick-demo run on the simulator (trace rows, event lines, fsyncs, renames, catalog commits,
the data-folder lock), then fails the N-th.  Here a stratified subset of N: every write of start-up,
every event line, every bookkeeping write after the last sample, and every 100th trace row, once as a
disk that stays full (ENOSPC from N on) and once as a single I/O error (EIO at N only).  Every N,
both ways, is bench/bench_storage.py (``--short`` runs this same subset).
"""

from __future__ import annotations

import errno
import json
import os
import sqlite3
from pathlib import Path
from typing import Any

import pytest
from storage_harness import problems, run_once, strata

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.record import catalog as catalog_module
from pycnoctl.controller.record import datalock, runfolder
from pycnoctl.controller.record.catalog import TERMINAL, Catalog
from pycnoctl.controller.record.runfolder import RunRecorder, load_run
from pycnoctl.sim.storage import IoPlan, VolatileDisk


@pytest.fixture(scope="module")
def clean(tmp_path_factory) -> tuple[int, dict[str, list[int]]]:
    o = run_once(tmp_path_factory.mktemp("clean"), IoPlan(None))
    assert o.rc == 0 and problems(o, o.plan.count) == []
    return o.plan.count, strata(o.plan.kinds)


def subset(st: dict[str, list[int]]) -> list[int]:
    return st["start-up"] + st["event"] + st["bookkeeping"] + st["trace"][::100] + st["trace"][-1:]


@pytest.mark.parametrize(("err", "persistent"), [(errno.ENOSPC, True), (errno.EIO, False)],
                         ids=["disk-full", "single-eio"])
def test_the_nth_write_failing_ends_safe_closed_and_readable(tmp_path, clean, err, persistent):
    total, st = clean
    assert total > 2000 and len(st["trace"]) > 2000  # the clean run really wrote its samples one by one
    failed: dict[int, list[str]] = {}
    ns = subset(st)
    for n in ns:
        o = run_once(tmp_path / f"n{n}", IoPlan(n, err=err, persistent=persistent))
        bad = problems(o, total)
        if bad:
            failed[n] = [o.plan.fired or "?", *bad]
    print(f"\n{len(ns)} of {total} writes failed in turn ({'disk full' if persistent else 'single EIO'}): "
          f"{len(ns) - len(failed)} ended safe, closed and readable")
    assert not failed, json.dumps(dict(list(failed.items())[:5]), indent=1)


def test_a_full_disk_mid_run_says_what_was_not_saved(tmp_path, clean):
    total, st = clean
    n = st["trace"][len(st["trace"]) // 2]
    o = run_once(tmp_path, IoPlan(n))
    assert o.rc == 3 and problems(o, total) == []
    (line,) = [ln for ln in o.err.splitlines() if ln.strip()]
    assert "ended in a fault (write_error)" in line and "No space left on device" in line
    assert "not saved: cycles.csv (disk full), summary.json (disk full)" in line
    (row,) = o.rows_before
    assert row.status == "running"  # the catalog is on the same full disk ...
    (row,) = o.rows_after
    assert row.status == "interrupted"  # ... so the next writer closes it
    assert o.stored is not None and o.stored.n_samples == o.acked_samples > 0


def test_a_catalog_that_fails_only_at_the_end_still_gets_the_row_closed(tmp_path, clean):
    total, st = clean
    n = st["bookkeeping"][-3]  # the cycles commit: the row itself can still be written afterwards
    o = run_once(tmp_path, IoPlan(n, persistent=False))
    assert o.plan.fired == "catalog commit" and o.rc == 3 and problems(o, total) == []
    (row,) = o.rows_before
    assert row.status == "fault" and "catalog cycles (disk full)" in (row.message or "")
    assert o.stored is not None and o.stored.summary is not None
    assert o.stored.summary["results"]["status"] == "completed"  # written before the catalog failed
    assert any(e["kind"] == "exception" and "not saved" in e["message"] for e in o.stored.events)


# ------------------------------------------------------------------------------------------------ power loss
def test_power_loss_at_any_point_keeps_what_was_acknowledged_durable(tmp_path, clean):
    """One clean run writes through a disk model that remembers what each fsync made durable; at
    chosen writes the folder is copied as a power loss there would leave it (unsynced data gone, or
    torn part-way), then reopened: the catalog opens and passes its integrity check, the run folder
    reads back with everything the recorder had acknowledged as durable, and the run shows as
    interrupted once the next writer takes the folder."""
    _total, st = clean
    root = tmp_path / "data"
    root.mkdir()
    disk = VolatileDisk(root)
    acked: dict[str, Any] = {"samples": 0, "events": 0, "recorder": False, "summary": False, "row": None}
    counts = {"samples": 0, "events": 0}
    cuts = sorted(set(st["start-up"][3:] + st["event"][::3] + st["bookkeeping"] + st["trace"][::400]))
    copies: list[tuple[int, Path, dict[str, Any]]] = []

    def at_write(n: int, what: str) -> None:
        if n in cuts:
            dest = disk.power_cut(tmp_path / f"cut{n}", keep_unsynced=0.5 if n % 2 else 0.0)
            copies.append((n, dest, {**acked, "written": counts["samples"]}))

    real = {k: getattr(RunRecorder, k) for k in ("__init__", "sample", "event", "sync", "close", "write_summary")}

    def durable_now(self: RunRecorder) -> None:  # what the recorder promises after sync()/close()
        acked["samples"], acked["events"] = counts["samples"], counts["events"]

    def wrap(name: str, after: Any) -> Any:
        def f(self: RunRecorder, *a: Any, **kw: Any) -> Any:
            out = real[name](self, *a, **kw)
            after(self)
            return out
        return f

    hooks = {
        "__init__": lambda self: acked.update(recorder=True),  # meta.json and the trace header are durable
        "sample": lambda self: counts.__setitem__("samples", counts["samples"] + 1),
        "event": lambda self: counts.__setitem__("events", counts["events"] + 1),
        "sync": durable_now, "close": durable_now,
        "write_summary": lambda self: acked.update(summary=True),
    }
    real_finish = Catalog.finish_run
    real_create = Catalog.create_run

    def create_run(self: Catalog, *a: Any, **kw: Any) -> str:
        rid = real_create(self, *a, **kw)
        acked["row"] = "running"
        return rid

    def finish_run(self: Catalog, run_id: str, status: str, **kw: Any) -> None:
        real_finish(self, run_id, status, **kw)
        acked["row"] = status

    plan = IoPlan(None)
    plan.on_write = at_write
    try:
        for name, after in hooks.items():
            setattr(RunRecorder, name, wrap(name, after))
        Catalog.create_run, Catalog.finish_run = create_run, finish_run  # type: ignore[method-assign]
        o = run_once(root, plan, disk)
    finally:
        for name, f in real.items():
            setattr(RunRecorder, name, f)
        Catalog.create_run, Catalog.finish_run = real_create, real_finish  # type: ignore[method-assign]
    assert o.rc == 0 and len(copies) == len(cuts) > 20
    interrupted, dropped = 0, []
    for n, dest, ack in copies:
        where = f"power cut at write {n} ({plan.kinds[n - 1]})"
        path = dest / "catalog.sqlite"
        if ack["row"] is None:
            continue  # nothing acknowledged yet
        with Catalog(path) as cat:
            assert cat.integrity_check() == "ok", where
        from pycnoctl.controller.cli.common import lock_data_folder

        lock_data_folder(dest, "run").release()  # the next writer after the power came back
        with Catalog.for_reading(path) as cat:
            rows = cat.list_runs()
        assert len(rows) == 1, f"{where}: {rows}"
        row = rows[0]
        assert row.status in TERMINAL, where
        if ack["row"] == "running":
            assert row.status == "interrupted", where
            interrupted += 1
        else:
            assert row.status == ack["row"], where
        folder = dest / "runs" / row.id
        if not ack["recorder"]:
            continue
        assert (folder / "meta.json").exists(), f"{where}: the run folder was lost"
        run = load_run(folder)
        assert run.n_samples >= ack["samples"], f"{where}: {run.n_samples} samples of {ack['samples']} durable"
        dropped.append(ack["written"] - run.n_samples)  # taken but not yet synced: lost, as a power loss would
        assert len(run.events) >= ack["events"], where
        if ack["summary"]:
            assert run.summary is not None and run.summary["run_id"] == row.id, where
        assert main(["runs", "--data", str(dest), "--json"]) == 0
    print(f"\n{len(copies)} power cuts: {interrupted} runs reopened as interrupted; unsynced samples dropped "
          f"per cut: max {max(dropped)}, {sum(d > 0 for d in dropped)} of {len(dropped)} cuts lost some")
    assert interrupted > 10 and max(dropped) > 0  # the model really dropped what was not synced


# ------------------------------------------------------------------------------------------------ read-only
@pytest.fixture
def read_only(monkeypatch):
    """Make a data folder read-only media.  chmod does not stop root (the suite runs as root here),
    so then EROFS is injected where the folder is opened for writing: files and the lock get
    EROFS at open, the catalog is opened as SQLite opens a file it may not write (mode=ro), and
    access(2) answers as it does on a read-only mount."""
    made: list[Path] = []

    def make(root: Path) -> None:
        if os.geteuid() != 0:
            made.append(root)
            for d, _dirs, files in os.walk(root):
                for f in files:
                    os.chmod(os.path.join(d, f), 0o444)
                os.chmod(d, 0o555)
            return
        inside = str(root.resolve())

        def under(p: Any) -> bool:
            return os.path.realpath(os.fspath(p)).startswith(inside)

        real_open, real_connect, real_access = open, sqlite3.connect, os.access

        def ro_open(file: Any, mode: str = "r", *a: Any, **kw: Any) -> Any:
            if any(c in mode for c in "wax+") and under(file):
                raise OSError(errno.EROFS, os.strerror(errno.EROFS), os.fspath(file))
            return real_open(file, mode, *a, **kw)

        def ro_connect(database: Any, *a: Any, **kw: Any) -> Any:
            if not kw.get("uri") and under(database):
                database, kw = f"file:{os.path.realpath(database)}?mode=ro", {**kw, "uri": True}
            return real_connect(database, *a, **kw)

        def ro_access(path: Any, mode: int, *a: Any, **kw: Any) -> bool:
            if mode & os.W_OK and under(path):
                return False
            return real_access(path, mode, *a, **kw)

        for m in (runfolder, datalock):
            monkeypatch.setattr(m, "open", ro_open, raising=False)
        monkeypatch.setattr(catalog_module.sqlite3, "connect", ro_connect)
        monkeypatch.setattr(catalog_module.os, "access", ro_access)
    yield make
    for root in made:  # writable again, so that the temporary folder can be removed
        for d, _dirs, _files in os.walk(root):
            os.chmod(d, 0o755)


def test_read_only_media_runs_and_show_read_and_run_refuses_in_one_line(tmp_path, capsys, read_only):
    data = tmp_path / "data"
    assert main(["run", "quick-demo", "--sim", "--quiet", "--data", str(data)]) == 0
    with Catalog(data / "catalog.sqlite") as cat:
        (row,) = cat.list_runs()
    capsys.readouterr()
    before = {p: p.read_bytes() for p in data.rglob("*") if p.is_file()}
    read_only(data)
    assert main(["runs", "--data", str(data), "--json"]) == 0
    out = capsys.readouterr()
    assert [r["run_id"] for r in json.loads(out.out)] == [row.id] and out.err == ""
    assert main(["show", row.id, "--data", str(data)]) == 0
    out = capsys.readouterr()
    assert row.id in out.out and out.err == ""
    assert main(["report", "--samples", "", "--data", str(data), "--out", str(tmp_path / "set.html")]) == 0
    capsys.readouterr()
    rc = main(["run", "quick-demo", "--sim", "--quiet", "--data", str(data)])
    out = capsys.readouterr()
    lines = [ln for ln in out.err.splitlines() if ln.strip()]
    assert rc == 6 and len(lines) == 1 and "read-only" in lines[0].lower(), out.err
    assert "Traceback" not in out.err + out.out
    assert {p: p.read_bytes() for p in before} == before  # nothing on the media changed


def test_a_read_only_catalog_is_opened_read_only_and_refuses_writes(tmp_path, read_only):
    data = tmp_path / "data"
    data.mkdir()
    with Catalog(data / "catalog.sqlite") as cat:
        cat.create_run(kind="measure", status="running")
    read_only(data)
    with Catalog.for_reading(data / "catalog.sqlite") as cat:
        assert cat.readonly and len(cat.list_runs()) == 1
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            cat.mark_interrupted_on_startup()


# ------------------------------------------------------------------------------------------------ daemon start
def test_a_daemon_restarted_on_a_still_full_disk_asserts_the_safe_state_and_exits_in_one_line(
        tmp_path, capsys, monkeypatch):
    """The previous daemon died on a full disk and left its run 'running'; the restarted one must
    mark it interrupted (a catalog write) and cannot: safe state, one line, exit 6, no traceback."""
    import logging
    import socket

    from pycnoctl.controller.jobs import measurement
    from pycnoctl.drivers import simulated
    from pycnoctl.sim.storage import FaultyFiles, patch_writers

    data = tmp_path / "data"
    data.mkdir()
    with Catalog(data / "catalog.sqlite") as cat:
        cat.create_run(kind="measure", status="running")
    seen: dict[str, Any] = {}
    real_build = simulated.build_sim_instrument

    def build(*a: Any, **kw: Any) -> Any:
        inst = real_build(*a, **kw)
        inst.valves.set_valves({"vent": False})
        inst.valves.set_valves({"inlet": True})  # as a crash mid-fill could leave the relays
        seen["truth"] = inst.extras["sim"]
        return inst

    monkeypatch.setattr(simulated, "build_sim_instrument", build)
    plan = IoPlan(4)  # the lock is taken (3 writes); from the first catalog commit on the disk is full
    layer = FaultyFiles(plan)
    monkeypatch.setattr(logging, "open", layer.open, raising=False)  # the daemon log: FileHandler opens with it
    undo = patch_writers(layer, [runfolder, datalock, measurement], Catalog)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    handlers = list(logging.getLogger("pycnoctl").handlers)
    try:
        rc = main(["serve", "--sim", "--data", str(data), "--port", str(port)])
    finally:
        undo()
        logging.getLogger("pycnoctl").handlers[:] = handlers  # as found, whatever the failure left
    out = capsys.readouterr()
    assert plan.fired == "catalog commit"
    v = seen["truth"].actual_valves()
    assert v["inlet"] is False and v["vent"] is True
    assert rc == 6 and "Traceback" not in out.err + out.out and "Logging error" not in out.err
    lines = [ln for ln in out.err.splitlines() if ln.strip()]
    assert lines[-1].startswith("pycnoctl serve: storage fault: disk full"), out.err
    assert len(lines) == 1


def test_a_daemon_log_on_a_failing_disk_says_so_once_without_a_traceback(tmp_path, capsys, monkeypatch):
    import logging

    from pycnoctl.controller.service.daemon import attach_json_log
    from pycnoctl.sim.storage import FaultyFiles

    plan = IoPlan(1, err=errno.EIO)
    monkeypatch.setattr(logging, "open", FaultyFiles(plan).open, raising=False)
    handler = attach_json_log(tmp_path / "daemon.log.jsonl")
    log = logging.getLogger("pycnoctl.test")
    try:
        for i in range(3):
            log.warning("record %d", i)
    finally:
        logging.getLogger("pycnoctl").removeHandler(handler)
        handler.close()
    err = capsys.readouterr().err
    assert plan.failed >= 3 and "Traceback" not in err and "Logging error" not in err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "daemon log" in lines[0] and "Input/output error" in lines[0]


def test_a_daemon_whose_run_cannot_create_its_record_stays_up_safe_and_paused(tmp_path, monkeypatch):
    import time

    from pycnoctl.controller.record.runfolder import RecordWriteError
    from pycnoctl.controller.service.daemon import Daemon
    from pycnoctl.drivers.simulated import build_sim_instrument

    def full(self: RunRecorder, root: Path, run_id: str, *a: Any, **kw: Any) -> None:
        cause = OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        raise RecordWriteError("run folder", Path(root) / run_id, cause) from cause  # as runfolder raises it

    monkeypatch.setattr(RunRecorder, "__init__", full)
    inst = build_sim_instrument(None)
    truth = inst.extras["sim"]
    d = Daemon(inst, tmp_path / "data")
    d.start()
    try:
        rid = d.submit(sequence="quick-demo")["run_id"]
        t_end = time.monotonic() + 10
        while d.catalog.get_run(rid).status in ("queued", "running") and time.monotonic() < t_end:
            time.sleep(0.02)
        time.sleep(0.2)
        row = d.catalog.get_run(rid)
        assert row.status == "fault" and "run record not created (disk full)" in (row.message or "")
        assert d.running and d.failed is None  # the loop (and the interlocks) go on
        s = d.snapshot()
        assert s["queue"]["paused"] and "not stored" in s["queue"]["paused_reason"]
        v = truth.actual_valves()
        assert v["inlet"] is False and v["vent"] is True
    finally:
        d.stop()
        d.catalog.close()
        inst.close()
