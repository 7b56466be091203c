"""Daemon core: event bus, sd_notify/watchdog over a real unix datagram socket, JSON log, start-up
bookkeeping, and a client that drops mid-stream leaving the control loop's tick lateness alone."""

from __future__ import annotations

import json
import logging
import os
import socket
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.service.api import serve_in_thread
from pycnoctl.controller.service.daemon import Daemon, EventBus, attach_json_log, sd_notify, watchdog_interval
from pycnoctl.drivers.simulated import build_sim_instrument


def test_event_bus_readers_poll_by_sequence_and_learn_of_losses() -> None:
    bus = EventBus(maxlen=4)
    assert bus.since(0) == ([], False)
    for i in range(3):
        bus.publish("sample", {"i": i})
    items, lost = bus.since(0)
    assert [d["i"] for _, _, d in items] == [0, 1, 2] and not lost
    items, lost = bus.since(items[-1][0])
    assert items == [] and not lost
    for i in range(3, 10):
        bus.publish("sample", {"i": i})
    items, lost = bus.since(2)
    assert lost and [d["i"] for _, _, d in items] == [6, 7, 8, 9]  # only the last 4 kept


def test_sd_notify_sends_datagrams(monkeypatch: pytest.MonkeyPatch) -> None:
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "notify")
        srv = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        srv.bind(path)
        srv.settimeout(2)
        monkeypatch.setenv("NOTIFY_SOCKET", path)
        assert sd_notify("READY=1")
        assert srv.recv(64) == b"READY=1"
        srv.close()
    monkeypatch.delenv("NOTIFY_SOCKET")
    assert sd_notify("READY=1") is False


def test_watchdog_interval_is_half_the_period(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("WATCHDOG_USEC", "4000000")
    monkeypatch.setenv("WATCHDOG_PID", str(os.getpid()))
    assert watchdog_interval() == pytest.approx(2.0)  # sd_watchdog_enabled(3): ping at half the period
    monkeypatch.setenv("WATCHDOG_PID", "1")
    assert watchdog_interval() is None  # meant for another process


def test_control_loop_pings_the_watchdog(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "notify")
        srv = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        srv.bind(path)
        srv.settimeout(3)
        monkeypatch.setenv("NOTIFY_SOCKET", path)
        monkeypatch.setenv("WATCHDOG_USEC", "200000")
        monkeypatch.delenv("WATCHDOG_PID", raising=False)
        inst = build_sim_instrument(None, realtime=True)
        daemon = Daemon(inst, tmp_path / "data")
        daemon.start()
        try:
            got = [srv.recv(64) for _ in range(3)]
        finally:
            daemon.stop()
            daemon.catalog.close()
            inst.close()
            srv.close()
    assert got.count(b"WATCHDOG=1") >= 2


def test_json_log_lines(tmp_path: Path) -> None:
    h = attach_json_log(tmp_path / "log.jsonl")
    try:
        logging.getLogger("pycnoctl.controller.service.daemon").warning("hello %s", "lab",
                                                                 extra={"data": {"event": "x", "v": float("nan")}})
    finally:
        logging.getLogger("pycnoctl").removeHandler(h)
        h.close()
    rec = json.loads((tmp_path / "log.jsonl").read_text().splitlines()[-1])
    assert rec["message"] == "hello lab" and rec["level"] == "warning" and rec["event"] == "x" and rec["v"] is None


def test_start_up_marks_orphaned_queued_runs_and_pauses(tmp_path: Path) -> None:
    data = tmp_path / "data"
    data.mkdir()
    with Catalog(data / "catalog.sqlite") as cat:
        running = cat.create_run(kind="measure", status="running")
        orphan = cat.create_run(kind="measure", status="queued")  # popped from the queue, then a crash
        kept = cat.create_run(kind="measure", status="queued")
        cat.queue_push(kept, {"sequence": "quick-demo"})
    inst = build_sim_instrument(None)
    d = Daemon(inst, data)
    try:
        s = d.snapshot()
        assert sorted(s["interrupted_on_start"]) == sorted([running, orphan])
        assert s["queue"]["paused"] and s["queue"]["length"] == 1
        assert d.catalog.get_run(running).status == "interrupted"
        assert d.catalog.get_run(orphan).status == "interrupted"
        assert d.catalog.get_run(kept).status == "queued"
    finally:
        d.catalog.close()
        inst.close()


def test_a_run_that_does_not_complete_pauses_the_queue(tmp_path: Path) -> None:
    inst = build_sim_instrument(None)
    d = Daemon(inst, tmp_path / "data")
    d.start()
    try:
        # a sequence whose fill cannot reach its target in time on this bench: the run faults
        text = (Path(__file__).parents[1] / "sequences" / "quick-demo.yaml").read_text()
        text = text.replace("timeout: 30 s\n  overshoot", "timeout: 0.5 s\n  overshoot")
        first = d.submit(sequence_text=text)["run_id"]
        second = d.submit(sequence="quick-demo")["run_id"]
        t_end = time.monotonic() + 10
        while d.catalog.get_run(first).status in ("queued", "running") and time.monotonic() < t_end:
            time.sleep(0.02)
        time.sleep(0.3)
        assert d.catalog.get_run(first).status == "fault"
        s = d.snapshot()
        assert s["queue"]["paused"] and first in s["queue"]["paused_reason"]
        assert d.catalog.get_run(second).status == "queued"
    finally:
        d.stop()
        d.catalog.close()
        inst.close()


# ----------------------------------------------------------------------------- dropped stream clients
@pytest.fixture
def served(tmp_path: Path) -> Iterator[tuple[Daemon, str]]:
    d = Daemon(build_sim_instrument(None, realtime=True), tmp_path / "data")
    with serve_in_thread(d) as url:
        yield d, url


def _p99(vals: list[float]) -> float:
    vals = sorted(vals)
    return vals[int(0.99 * (len(vals) - 1))]


def test_clients_dropping_mid_stream_leave_the_loop_alone(served: tuple[Daemon, str]) -> None:
    d, url = served
    time.sleep(0.5)
    d.stats.clear()
    time.sleep(2.0)
    quiet = d.stats.values()
    d.stats.clear()
    t0 = time.monotonic()
    got = 0
    for _ in range(8):  # each opens the stream, reads a little, and vanishes without a goodbye
        with httpx.Client(base_url=url, timeout=5) as c, c.stream("GET", "/api/events") as r:
            assert r.status_code == 200 and r.headers["content-type"].startswith("text/event-stream")
            for line in r.iter_lines():
                if line.startswith("event: sample"):
                    got += 1
                    break
    time.sleep(max(0.0, 2.0 - (time.monotonic() - t0)))
    busy = d.stats.values()
    assert got == 8
    assert d.running and len(busy) >= 0.8 * len(quiet)  # ticks kept coming (10 a second)
    # lateness is a matter of milliseconds either way; period 100 ms (common practice for 10 Hz loops).
    # A stall on a dropped client lasts as long as a socket write blocks (seconds); half a period of
    # margin keeps scheduling jitter on a loaded 2-core machine from failing it (a 20 ms margin failed
    # now and then in full-suite runs)
    assert _p99(busy) <= max(3 * _p99(quiet), _p99(quiet) + 0.05), (_p99(quiet), _p99(busy))
    s = httpx.get(url + "/api/status").json()
    assert s["loop"]["running"] and s["activity"] == "idle"


def test_sample_events_are_decimated_to_ten_a_second(served: tuple[Daemon, str]) -> None:
    _, url = served
    n = 0
    t_end = None
    with httpx.Client(base_url=url, timeout=5) as c, c.stream("GET", "/api/events") as r:
        for line in r.iter_lines():
            if line.startswith("event: sample"):
                if t_end is None:
                    t_end = time.monotonic() + 1.5
                n += 1
            if t_end is not None and time.monotonic() > t_end:
                break
    assert 5 <= n <= 17  # <= 10/s over 1.5 s (+ one at each edge)


def test_a_cycle_left_out_later_is_shown_not_kept_on_the_dashboard(tmp_path: Path) -> None:
    inst = build_sim_instrument(None)
    d = Daemon(inst, tmp_path / "data")
    try:
        with d._lock:
            d._snap["current_run"] = {"run_id": "R1", "cycle": 0, "cycles": []}
        for n in (1, 2, 3):
            d._on_event("cycle_done", {"cycle": n, "result": {"index": n, "volume_m3": 5e-6, "kept": True}})
        d._on_event("cycle_done", {"cycle": 4, "result": {"index": 4, "volume_m3": 5e-6, "kept": True},
                                   "left_out": [1]})
        assert [c["kept"] for c in d.snapshot()["current_run"]["cycles"]] == [False, True, True, True]
    finally:
        d.catalog.close()
        inst.close()
