"""Run records: round trip, torn tails, fsync cadence, atomic rewrites, write errors.

/dev/full (Linux, null(4) man page) fails every write with ENOSPC: a real "disk full".
"""

from __future__ import annotations

import errno
import importlib.metadata
import json
import math
import os
import time

import numpy as np
import pytest

from pycnoctl.controller.domain.devices import Reading, Validity
from pycnoctl.controller.record import runfolder as records
from pycnoctl.controller.record.runfolder import CycleRecord, RecordWriteError, RunRecorder, load_run

VALVES = ("inlet", "vent", "exp_small")


class FakeWall:
    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t


def make(tmp_path, **kw):
    return RunRecorder(tmp_path, "R20250101T120000Z-abc123", VALVES, {"sample_id": "soil-07"}, **kw)


def cycle(i: int, kept: bool = True) -> CycleRecord:
    return CycleRecord(i, 3.0, 150e3 + i, 80e3 + i, 10.0 * i, 10.0 * i + 5, 4.2, 3.9, 0.1, -0.2,
                       5.1e-6, 2e-9, ("drift",) if not kept else (), kept)


def test_round_trip_of_every_record(tmp_path):
    # thermometer and barometer values are passed on unchanged for several rows, as the controller
    # does between their (slower) reads: the row text made for them once must follow every change
    temps = [Reading(296.15 + 1e-3 * k, "K", k * 0.1) if k % 2 else None for k in range(20)]
    ambients = [101325.0 + 0.5 * (k // 3) for k in range(20)]
    with make(tmp_path) as rec:
        rec.event("state", 0.0, "idle -> fill")
        for k in range(20):
            valves = {"inlet": k < 10, "vent": False, "exp_small": k >= 15}
            p = (Reading(101325.0 + 1000.0 * k + 0.1, "Pa", k * 0.1) if k != 7
                 else Reading.invalid("Pa", 0.7, Validity.GARBLED, "b'\\x00?'"))
            temp, amb = temps[(k // 4) * 4 + 1 if k >= 12 else k], ambients[k - k % 3]
            rec.sample(k * 0.1, "fill", 1 if k else None, valves, p, temp, amb,
                       note="comma, and\nnewline" if k == 3 else "")
        rec.event("trip", 2.0, "overpressure", value=3.1e5, limit=3e5)
        rec.write_cycles([cycle(1), cycle(2, kept=False)])
        rec.write_summary(sequence={"name": "std", "cycles": 5}, sequence_text="name: std\ncycles: 5\n",
                          instrument={"name": "bench-1"}, calibration={"vc": 1e-5},
                          results={"volume_m3": 5.1e-6})
    run = load_run(tmp_path / "R20250101T120000Z-abc123")
    assert not run.torn_tail and run.n_samples == 20
    tr = run.trace
    np.testing.assert_array_equal(tr["t"], np.arange(20) * 0.1)  # repr() floats round-trip exactly
    assert tr["pressure_pa"][3] == 101325.0 + 3000.0 + 0.1
    assert math.isnan(tr["pressure_pa"][7]) and tr["pressure_valid"][7] == "garbled"
    assert tr["pressure_valid"][6] == "valid"
    assert tr["temperature_valid"][0] == "absent" and math.isnan(tr["temperature_k"][0])
    assert tr["temperature_k"][1] == 296.15 + 1e-3
    for k in range(20):
        temp, amb = temps[(k // 4) * 4 + 1 if k >= 12 else k], ambients[k - k % 3]
        assert tr["ambient_pa"][k] == amb
        if temp is None:
            assert tr["temperature_valid"][k] == "absent" and math.isnan(tr["temperature_k"][k])
        else:
            assert tr["temperature_valid"][k] == "valid" and tr["temperature_k"][k] == temp.value
    assert tr["cycle"][0] == -1 and tr["cycle"][5] == 1
    assert tr["note"][3] == "comma, and newline"
    v = run.valves()
    assert v["inlet"][:10].all() and not v["inlet"][10:].any() and v["exp_small"][15:].all()
    assert [e["kind"] for e in run.events] == ["state", "trip"]
    assert run.events[1]["value"] == 3.1e5
    assert len(run.cycles) == 2 and run.cycles[1]["kept"] is False and run.cycles[1]["flags"] == ["drift"]
    assert run.cycles[0]["p1_pa"] == 150e3 + 1
    s = run.summary
    assert s["software_version"] == importlib.metadata.version("pycnoctl")
    assert s["sequence"] == {"name": "std", "cycles": 5} and s["sequence_text"].startswith("name: std")
    assert run.meta["meta"] == {"sample_id": "soil-07"} and run.meta["valve_names"] == list(VALVES)


def test_torn_last_trace_row_and_event_line_are_dropped(tmp_path):
    rec = make(tmp_path)
    for k in range(5):
        rec.sample(k * 0.1, "idle", None, {}, Reading(1e5, "Pa", k * 0.1))
    rec.event("state", 0.5, "x")
    rec.close()
    folder = rec.folder
    with open(folder / "trace.csv", "a") as fh:
        fh.write("0.5,idle,,0,0,0,100000.")  # crash mid-row
    with open(folder / "events.jsonl", "a") as fh:
        fh.write('{"kind": "sta')
    run = load_run(folder)
    assert run.torn_tail and run.n_samples == 5
    assert run.torn_events and len(run.events) == 1


def test_missing_cycles_and_summary_after_a_crash_are_tolerated(tmp_path):
    rec = make(tmp_path)
    rec.sample(0.0, "idle", None, {}, Reading(1e5, "Pa", 0.0))
    run = load_run(rec.folder)  # recorder still open, as after a SIGKILL
    assert run.n_samples == 1 and run.cycles == [] and run.summary is None


def test_trace_fsync_at_most_every_interval_and_on_state_change(tmp_path, monkeypatch):
    wall = FakeWall()
    rec = make(tmp_path, fsync_interval=1.0, wall_clock=wall, sync_in_background=False)
    synced: list[int] = []
    real = os.fsync
    monkeypatch.setattr(records.os, "fsync", lambda fd: (synced.append(fd), real(fd))[1])
    trace_fd = rec._trace.fileno()
    for k in range(50):  # 5 s of samples at 10 Hz
        wall.t = k * 0.1
        rec.sample(k * 0.1, "fill", 1, {}, Reading(1e5, "Pa", k * 0.1))
    n = synced.count(trace_fd)
    assert 4 <= n <= 5
    rec.event("state", 5.0, "fill -> settle")
    assert synced.count(trace_fd) == n + 1
    rec.close()


def test_background_fsync_keeps_the_caller_off_the_disk(tmp_path, monkeypatch):
    import threading

    callers: list[int] = []
    real = os.fsync
    monkeypatch.setattr(records.os, "fsync", lambda fd: (callers.append(threading.get_ident()), real(fd))[1])
    rec = make(tmp_path, fsync_interval=0.05)
    me = threading.get_ident()
    callers.clear()  # creating the folder makes meta.json and the header durable, in the caller
    for k in range(70):
        rec.sample(k * 0.1, "fill", 1, {}, Reading(1e5, "Pa", k * 0.1))
        if k % 2 == 0:  # a burst of events: they share fsyncs at most MIN_GAP apart
            rec.event("state", k * 0.1, "tick")
        time.sleep(0.01)
    assert me not in callers  # sample() and event() never wait for the disk
    n_sync = len(callers) // 2  # two files per fsync round
    assert 2 <= n_sync <= 0.7 / records._Syncer.MIN_GAP + 1
    rec.close()
    assert callers.count(me) == 2  # close() makes both files durable itself


def test_close_does_not_wait_out_the_fsync_coalescing_pause(tmp_path, monkeypatch):
    # A run that ends right after a state change must not sit in close() until the syncer's
    # pause between fsyncs is over: with a 30 s pause, close() has to return at once.
    monkeypatch.setattr(records._Syncer, "MIN_GAP", 30.0)
    rec = make(tmp_path, fsync_interval=0.01)
    rec.event("state", 0.0, "fill -> settle")  # the syncer starts its pause
    time.sleep(0.05)
    t0 = time.monotonic()
    rec.close()
    assert time.monotonic() - t0 < 5.0
    assert records.load_run(rec.folder).events[-1]["message"] == "fill -> settle"


def test_disk_full_on_trace_raises_record_write_error(tmp_path):
    rec = make(tmp_path)
    rec._trace = open("/dev/full", "wb", buffering=0)  # noqa: SIM115 - every write fails with ENOSPC
    with pytest.raises(RecordWriteError) as ei:
        rec.sample(1.5, "fill", 1, {}, Reading(1e5, "Pa", 1.5))
    assert "trace sample t=1.5" in str(ei.value)
    assert ei.value.__cause__.errno == errno.ENOSPC
    assert rec.n_samples == 0


def test_failed_atomic_rewrite_keeps_the_old_file(tmp_path, monkeypatch):
    rec = make(tmp_path)
    rec.write_cycles([cycle(1)])
    before = (rec.folder / "cycles.csv").read_bytes()

    def boom(src, dst):
        raise OSError(errno.EIO, "I/O error")

    monkeypatch.setattr(records.os, "replace", boom)
    with pytest.raises(RecordWriteError) as ei:
        rec.write_cycles([cycle(1), cycle(2)])
    assert "cycles.csv" in str(ei.value)
    assert (rec.folder / "cycles.csv").read_bytes() == before
    assert not list(rec.folder.glob(".*.tmp"))
    rec.close()


def test_refuses_existing_folder_and_unsafe_ids(tmp_path):
    make(tmp_path).close()
    with pytest.raises(RecordWriteError):
        make(tmp_path)
    for bad in ("../escape", "a/b", "", ".hidden"):
        with pytest.raises(ValueError):
            RunRecorder(tmp_path, bad, VALVES, {})


def test_summary_refuses_unrecordable_objects(tmp_path):
    rec = make(tmp_path)
    with pytest.raises(ValueError):
        rec.write_summary(sequence=object(), sequence_text="", instrument={}, calibration=None, results={})
    rec.close()
    assert not (rec.folder / "summary.json").exists()
    assert json.loads((rec.folder / "meta.json").read_text())["run_id"] == rec.run_id


def test_free_text_in_a_trace_row_round_trips_as_csv(tmp_path):
    # RFC 4180 quoting (the csv module) for a note with a comma, quotes and a line break
    rec = make(tmp_path)
    note = 'operator said: "ok, go"\nnext'
    rec.sample(0.1, "fill", 1, {"inlet": True}, Reading(1.5e5, "Pa", 0.1), None, 101325.0, note)
    rec.sample(0.2, "fill", None, {}, Reading(1.4e5, "Pa", 0.2))
    rec.close()
    run = load_run(rec.folder)
    assert list(run.trace["note"]) == ['operator said: "ok, go" next', ""]
    assert list(run.trace["pressure_pa"]) == [1.5e5, 1.4e5]


def test_a_damaged_file_is_named_apart_from_its_path(tmp_path):
    import pickle

    rec = make(tmp_path)
    for k in range(5):
        rec.sample(k * 0.1, "idle", None, {}, Reading(1e5, "Pa", k * 0.1))
    rec.close()
    folder = rec.folder
    lines = (folder / "trace.csv").read_text().splitlines(keepends=True)
    header = lines[0].rstrip("\n").split(",")
    row = lines[2].rstrip("\n").split(",")
    row[header.index("t")] = "garbage"
    lines[2] = ",".join(row) + "\n"
    (folder / "trace.csv").write_text("".join(lines))
    with pytest.raises(records.DamagedFile) as caught:
        load_run(folder)
    assert caught.value.name == "trace.csv" and "'t'" in caught.value.detail
    assert str(tmp_path) not in caught.value.detail
    again = pickle.loads(pickle.dumps(caught.value))  # it crosses the report worker's process boundary
    assert (again.name, again.detail) == (caught.value.name, caught.value.detail)

    (folder / "summary.json").write_text("[1, 2]")
    (folder / "trace.csv").write_text("".join(lines[:2]))
    with pytest.raises(records.DamagedFile) as caught:
        load_run(folder)
    assert caught.value.name == "summary.json" and caught.value.detail == "not a JSON object (a list)"
