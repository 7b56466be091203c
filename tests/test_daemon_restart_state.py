"""A clean restart (the daemon stopped as on SIGTERM, then started again on the same data folder) keeps
what an operator must clear: a latched interlock and a paused queue.  A daemon that finds runs
waiting from before its restart starts none of them until the operator resumes the queue.

In process, on the simulator's clock: ``Daemon.stop`` is what ``serve`` runs on SIGTERM.
"""

from __future__ import annotations

import json
import logging
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from pycnoctl.controller.service.daemon import Daemon, attach_json_log
from pycnoctl.drivers.instrument import Instrument
from pycnoctl.drivers.simulated import build_sim_instrument

STATE_FILE = "daemon-state.json"  # where the daemon keeps its pause and latch (daemon.STATE_FILE)
QUICK = Path(__file__).parents[1] / "sequences" / "quick-demo.yaml"


class Started:
    """Daemons made on one data folder, each stopped (safe state) and closed at the end."""

    def __init__(self, data: Path) -> None:
        self.data = data
        self.made: list[tuple[Daemon, Instrument]] = []

    def __call__(self, *, start: bool = True) -> Daemon:
        inst = build_sim_instrument(None)
        d = Daemon(inst, self.data)
        self.made.append((d, inst))
        if start:
            d.start()
        return d

    def stop(self, d: Daemon) -> None:
        d.stop()
        d.catalog.close()

    def close(self) -> None:
        for d, inst in self.made:
            if d.running:
                d.stop()
            d.catalog.close()
            inst.close()


@pytest.fixture
def daemons(tmp_path: Path) -> Iterator[Started]:
    s = Started(tmp_path / "data")
    try:
        yield s
    finally:
        s.close()


def wait_for(pred: Callable[[], bool], timeout: float = 10.0) -> None:
    t_end = time.monotonic() + timeout
    while not pred():
        if time.monotonic() > t_end:
            raise AssertionError("condition not met in time")
        time.sleep(0.02)


def test_a_latch_and_a_pause_survive_a_clean_restart(daemons: Started) -> None:
    a = daemons()
    text = QUICK.read_text().replace("timeout: 30 s\n  overshoot", "timeout: 0.5 s\n  overshoot")  # fill faults
    first = a.submit(sequence_text=text)["run_id"]
    second = a.submit(sequence="quick-demo")["run_id"]
    wait_for(lambda: a.catalog.get_run(first).status == "fault")
    wait_for(lambda: a.snapshot()["queue"]["paused"] and a.snapshot()["interlock"]["latched"])
    kind = a.snapshot()["interlock"]["kind"]
    daemons.stop(a)

    handler = attach_json_log(daemons.data / "daemon.log.jsonl")  # as serve does
    try:
        b = daemons()
    finally:
        logging.getLogger("pycnoctl").removeHandler(handler)
        handler.close()
    s = b.snapshot()
    assert s["interlock"]["latched"] and s["interlock"]["kind"] == kind
    assert s["queue"]["paused"] and first in s["queue"]["paused_reason"]
    assert "before the daemon restarted" in s["queue"]["paused_reason"]
    time.sleep(0.5)  # every chance to (wrongly) start the waiting run
    assert b.catalog.get_run(second).status == "queued" and b.snapshot()["current_run"] is None
    assert b.snapshot()["activity"] == "tripped"
    said = [json.loads(x) for x in (daemons.data / "daemon.log.jsonl").read_text().splitlines()]
    assert any(x.get("event") == "latched_on_start" and x.get("interlock") == kind for x in said)
    assert any(x.get("event") == "paused_on_start" and first in x["message"] for x in said)

    # the operator resets (the simulator is vented) and resumes: only then does the next run start
    ok, why = b.submit_reset().result(5)
    assert ok, why
    assert not b.snapshot()["interlock"]["latched"]
    time.sleep(0.3)
    assert b.catalog.get_run(second).status == "queued"  # a reset never starts anything
    b.resume()
    wait_for(lambda: b.catalog.get_run(second).status not in ("queued",))


def test_the_operators_pause_survives_a_clean_restart_with_an_empty_queue(daemons: Started) -> None:
    a = daemons()
    a.pause()
    daemons.stop(a)
    b = daemons()
    s = b.snapshot()
    assert s["queue"]["paused"] and "paused by the operator" in s["queue"]["paused_reason"]
    b.submit(sequence="quick-demo")  # queued after the restart: still waits for the operator
    time.sleep(0.5)
    assert b.snapshot()["current_run"] is None and b.snapshot()["queue"]["length"] == 1
    daemons.stop(b)
    # resumed, then stopped before it could start the run: on a daemon whose control loop is not running
    # (a running one may start the run between the resume and the stop, as it should)
    b2 = daemons(start=False)
    b2.resume()
    daemons.stop(b2)
    c = daemons(start=False)
    # resumed before the stop, but a run is waiting from before this start: paused all the same
    s = c.snapshot()
    assert s["queue"]["paused"] and "1 run waiting from before the daemon restarted" in s["queue"]["paused_reason"]


def test_an_abort_then_a_clean_restart_starts_nothing(daemons: Started) -> None:
    a = daemons()
    first = a.submit(sequence="quick-demo")["run_id"]
    second = a.submit(sequence="quick-demo")["run_id"]
    wait_for(lambda: a.snapshot()["current_run"] is not None)
    assert a.abort()
    wait_for(lambda: a.catalog.get_run(first).status == "aborted")
    wait_for(lambda: a.snapshot()["queue"]["paused"])
    daemons.stop(a)
    b = daemons()
    time.sleep(0.5)
    s = b.snapshot()
    assert s["queue"]["paused"] and first in s["queue"]["paused_reason"]
    assert s["current_run"] is None and b.catalog.get_run(second).status == "queued"


def test_a_damaged_state_file_starts_paused(daemons: Started) -> None:
    daemons.data.mkdir(parents=True)
    (daemons.data / STATE_FILE).write_text('{"version": 1, "paus')
    b = daemons(start=False)
    s = b.snapshot()
    assert s["queue"]["paused"] and STATE_FILE in s["queue"]["paused_reason"]
    assert "damaged" in s["queue"]["paused_reason"]


def test_a_damaged_state_file_latches_since_the_latch_it_held_is_not_known(daemons: Started) -> None:
    """Found by a sweep: a state file damaged by hand lost the latch it may have held (the daemon started
    paused, and `reset` said nothing was latched).  Now it starts latched: only an operator's reset, on a
    vented instrument, clears it, and the latch is saved again so a second restart keeps it."""
    daemons.data.mkdir(parents=True)
    (daemons.data / STATE_FILE).write_text('{"version": 1, "paused": true, "latched": {"kind": "overpr')
    b = daemons()
    s = b.snapshot()
    assert s["queue"]["paused"] and s["interlock"]["latched"]
    assert s["interlock"]["kind"] == "saved_state_damaged" and STATE_FILE in s["interlock"]["message"]
    daemons.stop(b)
    c = daemons()  # the damaged file was replaced by one that keeps the latch
    assert c.snapshot()["interlock"]["latched"]
    wait_for(lambda: c.running and c.snapshot()["pressure"]["gauge_pa"] is not None)
    ok, why = c.submit_reset().result(5)
    assert ok, why
    assert not c.snapshot()["interlock"]["latched"]
    daemons.stop(c)
    assert json.loads((daemons.data / STATE_FILE).read_text())["latched"] is None


def test_a_trip_while_idle_pauses_the_queue_so_the_reset_starts_nothing(daemons: Started) -> None:
    """Found by a sweep: a trip with no run going only latched the interlock; a run submitted meanwhile
    waited for the latch alone, and the operator's reset started it at once ('a reset never restarts
    anything').  The trip pauses the queue; only a resume after the reset starts a run."""
    a = daemons()
    wait_for(lambda: a.running and a.snapshot()["activity"] == "idle")
    a.call(lambda c: c.monitor.trip_external("device_error", c.instrument.clock.now(), "injected while idle"))
    wait_for(lambda: a.snapshot()["interlock"]["latched"])
    wait_for(lambda: a.snapshot()["queue"]["paused"])
    assert "interlock device_error tripped" in a.snapshot()["queue"]["paused_reason"]
    rid = a.submit(sequence="quick-demo")["run_id"]
    ok, why = a.submit_reset().result(5)
    assert ok, why
    time.sleep(0.5)  # every chance to (wrongly) start it
    assert a.catalog.get_run(rid).status == "queued"
    a.resume()
    wait_for(lambda: a.catalog.get_run(rid).status != "queued")


def test_a_saved_latch_without_a_pause_starts_paused(daemons: Started) -> None:
    """A state file that says latched but not paused (written before trips paused the queue, or by hand)."""
    daemons.data.mkdir(parents=True, exist_ok=True)
    (daemons.data / STATE_FILE).write_text(json.dumps({
        "version": 1, "paused": False, "paused_reason": None,
        "latched": {"kind": "inlet_leak", "message": "pressure rose", "value": 2500.0, "limit": 2000.0}}))
    b = daemons()
    s = b.snapshot()
    assert s["interlock"]["latched"] and s["queue"]["paused"]
    assert "interlock inlet_leak latched before the daemon restarted" in s["queue"]["paused_reason"]


def test_the_state_is_written_off_the_control_thread_and_flushed_at_stop(daemons: Started,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """Found by a sweep: a trip's latch was written (with fsync) on the control thread; on a slow card that
    holds a tick.  The control thread now hands the write to a writer thread, and stop() writes what is
    left, so the saved latch is the same."""
    import threading

    from pycnoctl.controller.service import daemon as daemon_module

    writers: list[str] = []
    real = daemon_module.atomic_write

    def slow_write(path: Path, data: bytes) -> None:
        writers.append(threading.current_thread().name)
        time.sleep(0.3)  # a slow card
        real(path, data)

    monkeypatch.setattr(daemon_module, "atomic_write", slow_write)
    a = daemons()
    wait_for(lambda: a.running and a.snapshot()["activity"] == "idle")
    writers.clear()
    a.call(lambda c: c.monitor.trip_external("device_error", c.instrument.clock.now(), "injected while idle"))
    wait_for(lambda: a.snapshot()["interlock"]["latched"] and a.snapshot()["queue"]["paused"])
    daemons.stop(a)
    assert writers and "pycnoctl-control" not in writers, writers
    saved = json.loads((daemons.data / STATE_FILE).read_text())
    assert saved["latched"]["kind"] == "device_error" and saved["paused"]


def _load_within(path: Path, seconds: float = 10.0) -> tuple[dict[str, object], str | None, bool]:
    """load_daemon_state(path) in a thread; if it blocks (an open of a FIFO waits for a writer), a writer
    end is opened and closed to let it go, and the third item says it had blocked."""
    import os
    import threading

    from pycnoctl.controller.service.daemon import load_daemon_state

    out: list[tuple[dict[str, object], str | None]] = []
    t = threading.Thread(target=lambda: out.append(load_daemon_state(path)), daemon=True)
    t.start()
    t.join(seconds)
    blocked = t.is_alive()
    if blocked:
        os.close(os.open(path, os.O_WRONLY | os.O_NONBLOCK))
        t.join(seconds)
    return (*out[0], blocked)


def test_a_fifo_in_place_of_the_state_file_is_not_opened(tmp_path: Path) -> None:
    """Found by a sweep: a FIFO at <data>/daemon-state.json made `serve` hang at start, its open waiting
    for a writer. Only a regular file is opened; anything else is a damaged state naming its path."""
    import os

    path = tmp_path / STATE_FILE
    os.mkfifo(path)
    state, problem, blocked = _load_within(path, 3.0)
    assert not blocked
    assert state == {} and problem is not None and "FIFO" in problem
    assert f"remove or replace {path}" in problem


@pytest.mark.parametrize("what", ["directory", "device"])
def test_what_the_daemon_cannot_save_over_is_named_with_its_path(daemons: Started, what: str) -> None:
    """Found by a sweep: a directory in place of the state file started latched, but no state could ever be
    saved there again (IsADirectoryError at every save) and every restart latched again with no hint.
    The latch and the pause say what is there and to remove or replace that path."""
    daemons.data.mkdir(parents=True)
    path = daemons.data / STATE_FILE
    if what == "directory":
        path.mkdir()
    else:  # a device is never opened (opening a serial port, say, may reset what hangs on it)
        path.symlink_to("/dev/null")
    b = daemons(start=False)
    s = b.snapshot()
    assert s["interlock"]["latched"] and s["interlock"]["kind"] == "saved_state_damaged"
    assert s["queue"]["paused"]
    for said in (s["interlock"]["message"], s["queue"]["paused_reason"]):
        assert f"a {what}, not a file" in said and f"remove or replace {path}" in said


@pytest.mark.parametrize("saved", [
    {"version": True, "paused": False, "paused_reason": None, "latched": None},
    {"version": 1.0, "paused": False, "paused_reason": None, "latched": None},
])
def test_a_state_whose_version_is_not_the_int_1_is_damaged(tmp_path: Path, saved: dict[str, object]) -> None:
    """Found by a sweep: {"version": true, ...} was read as version 1 (True == 1 in Python)."""
    from pycnoctl.controller.service.daemon import load_daemon_state

    (tmp_path / STATE_FILE).write_text(json.dumps(saved))
    assert load_daemon_state(tmp_path / STATE_FILE) == ({}, "not a version 1 state")


@pytest.mark.parametrize("latched", [{}, {"kind": ""}, {"kind": None, "message": "x"}, {"kind": 7}])
def test_a_saved_latch_without_a_kind_latches_as_damaged(daemons: Started, latched: dict[str, object]) -> None:
    """Found by a sweep: {"latched": {}} started latched as 'interlock unknown latched: ;'. A latch that
    does not say which rule latched is a damaged state: latched, with the damaged state's kind and why."""
    daemons.data.mkdir(parents=True)
    (daemons.data / STATE_FILE).write_text(json.dumps(
        {"version": 1, "paused": False, "paused_reason": None, "latched": latched}))
    b = daemons(start=False)
    s = b.snapshot()
    assert s["interlock"]["latched"] and s["interlock"]["kind"] == "saved_state_damaged"
    assert "a latch without its kind" in s["interlock"]["message"]
    assert s["queue"]["paused"] and "unknown" not in s["queue"]["paused_reason"]
