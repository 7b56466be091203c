"""SIGKILL mid-run, then restart (safety.md fault plan: "daemon SIGKILL mid-run").

Expected: the restarted daemon comes up in the safe state, marks the run interrupted, never
resumes it, keeps the rest of the queue queued but paused until the operator resumes, and the
killed run's trace is readable.  Then SIGTERM mid-run: the run is aborted into the safe state.
The daemon runs as a real subprocess on the real-time simulator (sped up), its data folder on
tmpfs when there is one (fsync there costs nothing, so the sped-up clock stays honest).
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from pycnoctl.controller.record.runfolder import load_run

SAFE = {"inlet": False, "vent": True, "exp_small": True, "exp_large": True}  # clean sim: ValveRoles.safe_state()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture
def data_dir(tmp_path: Path) -> Iterator[Path]:
    if os.path.isdir("/dev/shm"):
        with tempfile.TemporaryDirectory(dir="/dev/shm") as d:
            yield Path(d)
    else:
        yield tmp_path


class Serve:
    def __init__(self, data: Path, port: int, speed: float = 5.0) -> None:
        self.url = f"http://127.0.0.1:{port}"
        self.log = open(data / f"serve-{time.monotonic_ns()}.err", "w+")  # noqa: SIM115
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "pycnoctl.controller.cli.main", "serve", "--sim", "--speed", str(speed),
             "--data", str(data), "--port", str(port)], stdout=subprocess.DEVNULL, stderr=self.log)
        self.http = httpx.Client(base_url=self.url, timeout=5.0)
        t_end = time.monotonic() + 20
        while True:
            try:
                self.http.get("/api/status")
                break
            except httpx.HTTPError:
                if self.proc.poll() is not None or time.monotonic() > t_end:
                    self.log.seek(0)
                    raise AssertionError(f"daemon did not start: {self.log.read()}") from None
                time.sleep(0.1)

    def status(self) -> dict:
        return self.http.get("/api/status").json()

    def wait(self, pred, timeout: float = 20.0) -> dict:  # type: ignore[no-untyped-def]
        t_end = time.monotonic() + timeout
        while time.monotonic() < t_end:
            s = self.status()
            if pred(s):
                return s
            time.sleep(0.05)
        raise AssertionError(f"condition not met; last status {json.dumps(s)[:600]}")

    def close(self) -> None:
        self.http.close()
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait(10)
        self.log.close()


def test_sigkill_mid_run_then_restart(data_dir: Path) -> None:
    port = free_port()
    a = Serve(data_dir, port)
    try:
        first = a.http.post("/api/runs", json={"sequence": "quick-demo", "sample_id": "TILE-KILL"}).json()["run_id"]
        second = a.http.post("/api/runs", json={"sequence": "quick-demo", "sample_id": "TILE-NEXT"}).json()["run_id"]
        a.wait(lambda s: s["current_run"] and s["current_run"]["run_id"] == first
               and (s["current_run"].get("elapsed_s") or 0) > 3.0)
        acked = [a.status()["pressure"]["t"] for _ in range(5)]  # samples the daemon has reported
        os.kill(a.proc.pid, signal.SIGKILL)
        assert a.proc.wait(10) == -signal.SIGKILL
    finally:
        a.close()
    trace_before = load_run(data_dir / "runs" / first)
    assert trace_before.n_samples > 10  # flushed as taken: readable after the kill
    # no acknowledged sample lost (safety plan figure: 0): a sample is in the trace before it is reported
    recorded = set(trace_before.trace["t"].tolist())
    lost = [t for t in acked if t not in recorded]
    assert lost == [], f"acknowledged samples missing from the trace: {lost}"

    b = Serve(data_dir, port)
    try:
        s = b.status()
        assert s["interrupted_on_start"] == [first]
        assert s["valves"] == SAFE or b.wait(lambda s: s["valves"] == SAFE)  # safe state asserted on start
        assert s["queue"]["paused"] and first in s["queue"]["paused_reason"]
        time.sleep(1.0)  # give it every chance to (wrongly) start something
        s = b.status()
        assert s["current_run"] is None and s["activity"] == "idle"
        assert s["queue"]["length"] == 1
        row = b.http.get(f"/api/runs/{first}").json()
        assert row["status"] == "interrupted" and "not resumed" in row["message"]
        assert b.http.get(f"/api/runs/{second}").json()["status"] == "queued"
        csv = b.http.get(f"/api/runs/{first}/trace.csv")
        assert csv.status_code == 200 and len(csv.text.splitlines()) >= trace_before.n_samples + 1
        log_lines = [json.loads(x) for x in (data_dir / "daemon.log.jsonl").read_text().splitlines()]
        starts = [x for x in log_lines if x.get("event") == "safe_state" and x.get("why") == "start"]
        assert len(starts) == 2  # once per start-up
        assert any(x.get("event") == "interrupted_on_start" for x in log_lines)

        # the operator resumes: the next queued run starts; SIGTERM mid-run aborts it into the safe state
        b.http.post("/api/queue/resume")
        b.wait(lambda s: s["current_run"] and s["current_run"]["run_id"] == second
               and (s["current_run"].get("elapsed_s") or 0) > 1.0)
        b.proc.send_signal(signal.SIGTERM)
        assert b.proc.wait(15) == 0
    finally:
        b.close()
    stored = load_run(data_dir / "runs" / second)
    assert stored.summary is not None and stored.summary["results"]["status"] == "aborted"
    # the record says the daemon's shutdown stopped it, not an operator who asked nothing
    assert stored.summary["results"]["abort_reason"] == "the daemon shut down on SIGTERM"
    log_lines = [json.loads(x) for x in (data_dir / "daemon.log.jsonl").read_text().splitlines()]
    stops = [x for x in log_lines if x.get("event") == "safe_state" and x.get("why") == "stop"]
    assert stops and "SIGTERM" in stops[-1]["message"]
    last = {v: bool(stored.trace[f"valve_{v}"][-1]) for v in SAFE}
    assert last == SAFE  # the record ends in the safe state
    with contextlib.suppress(FileNotFoundError):
        (data_dir / "catalog.sqlite-wal").stat()


def test_sigterm_after_an_abort_then_restart_stays_paused(data_dir: Path) -> None:
    """The sweep's case: abort (the queue pauses with a run waiting), SIGTERM, start again: nothing starts."""
    port = free_port()
    a = Serve(data_dir, port, speed=20.0)
    try:
        first = a.http.post("/api/runs", json={"sequence": "grain-volume"}).json()["run_id"]
        second = a.http.post("/api/runs", json={"sequence": "quick-demo"}).json()["run_id"]
        a.wait(lambda s: s["current_run"] and s["current_run"]["run_id"] == first)
        assert a.http.post("/api/abort").status_code == 202
        a.wait(lambda s: s["queue"]["paused"] and s["current_run"] is None)
        a.proc.send_signal(signal.SIGTERM)
        assert a.proc.wait(15) == 0
    finally:
        a.close()
    b = Serve(data_dir, port, speed=20.0)
    try:
        time.sleep(1.0)  # every chance to (wrongly) start the waiting run
        s = b.status()
        assert s["current_run"] is None and s["queue"]["paused"] and s["queue"]["length"] == 1
        assert first in s["queue"]["paused_reason"]
        assert b.http.get(f"/api/runs/{second}").json()["status"] == "queued"
        b.log.seek(0)
        said = b.log.read()
        assert "queue paused:" in said and first in said  # said at start, on stderr
    finally:
        b.close()
