"""One writer per data folder (flock on pycnoctl.lock, released by the OS when the owner dies).

A second writer is refused with the owner's pid and command (exit 2, one line) and touches no
device; a writer killed with SIGKILL leaves a stale lock the next writer recognises, marking the
run it left 'running' as interrupted (never resumed).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.datalock import LOCK_NAME, DataFolderBusy, acquire


def test_second_writer_in_this_process_is_refused_and_a_clean_release_leaves_no_stale_owner(tmp_path):
    first = acquire(tmp_path, "pycnoctl run")
    with pytest.raises(DataFolderBusy, match=rf"pid {os.getpid()} \(pycnoctl run"):
        acquire(tmp_path, "pycnoctl serve")
    first.release()
    assert (tmp_path / LOCK_NAME).read_text() == ""
    with acquire(tmp_path, "pycnoctl serve") as again:
        assert again.stale is None
        assert json.loads((tmp_path / LOCK_NAME).read_text())["command"] == "pycnoctl serve"


def _wait_for(cond, timeout: float = 60.0) -> None:
    t_end = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > t_end:
            raise AssertionError("timed out waiting")
        time.sleep(0.1)


def _running_rows(data) -> list:
    path = data / "catalog.sqlite"
    if not path.exists():
        return []
    with Catalog(path) as cat:
        return [r for r in cat.list_runs() if r.status == "running"]


def test_live_run_refuses_a_second_writer_and_a_sigkilled_run_is_marked_interrupted(tmp_path, capsys):
    data = tmp_path / "data"
    owner = subprocess.Popen(
        [sys.executable, "-m", "pycnoctl.controller.cli.main", "run", "grain-volume", "--sim", "--realtime",
         "--quiet", "--data", str(data)],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        _wait_for(lambda: bool(_running_rows(data)))
        (live,) = _running_rows(data)
        for verb in (["run", "quick-demo", "--sim", "--quiet"], ["serve", "--sim"],
                     ["calibrate", "--sim", "--sphere", "D=25.4 mm,u=0.002 mm", "--yes"]):
            rc = main([*verb, "--data", str(data)])
            err = capsys.readouterr().err
            assert rc == 2, (verb, err)
            lines = err.strip().splitlines()
            assert len(lines) == 1 and f"pid {owner.pid} (pycnoctl run" in lines[0], err
        assert [r.id for r in _running_rows(data)] == [live.id]  # the live run was left alone
        assert main(["runs", "--data", str(data)]) == 0  # readers take no lock
        capsys.readouterr()
    finally:
        owner.send_signal(signal.SIGKILL)
        owner.wait(30)
    assert [r.id for r in _running_rows(data)] == [live.id]  # killed: its row still says running
    rc = main(["run", "quick-demo", "--sim", "--quiet", "--data", str(data)])
    err = capsys.readouterr().err
    assert rc == 0
    assert f"run {live.id} was left running by pid {owner.pid}" in err
    with Catalog(data / "catalog.sqlite") as cat:
        old = cat.get_run(live.id)
        assert old is not None and old.status == "interrupted"
        assert f"pid {owner.pid}" in (old.message or "") and "not resumed" in old.message
        assert [r.status for r in cat.list_runs() if r.id != live.id] == ["completed"]


def test_the_unit_file_caps_restarts_of_a_daemon_that_fails_on_start_up():
    import configparser
    from pathlib import Path

    unit = configparser.ConfigParser(strict=False, interpolation=None)
    unit.optionxform = str  # type: ignore[assignment,method-assign]
    unit.read(Path(__file__).parents[1] / "systemd" / "pycnoctl.service")
    interval = float(unit["Unit"]["StartLimitIntervalSec"])
    burst = int(unit["Unit"]["StartLimitBurst"])
    restart_sec = float(unit["Service"]["RestartSec"])
    assert unit["Service"]["Restart"] == "on-failure" and burst >= 1
    # a daemon failing at once is restarted every RestartSec: the burst must be used up inside the interval
    assert burst * restart_sec < interval


def test_analyze_reads_without_the_lock_but_saves_only_with_it(tmp_path, capsys):
    data = tmp_path / "data"
    assert main(["run", "quick-demo", "--sim", "--quiet", "--data", str(data)]) == 0
    with Catalog(data / "catalog.sqlite") as cat:
        (row,) = cat.list_runs()
    capsys.readouterr()
    with acquire(data, "pycnoctl serve"):
        assert main(["analyze", row.id, "--data", str(data), "--json"]) == 0
        assert main(["analyze", row.id, "--data", str(data), "--save"]) == 2
        assert "in use by pid" in capsys.readouterr().err
        assert not (data / "runs" / row.id / "reanalysis.json").exists()
    assert main(["analyze", row.id, "--data", str(data), "--save"]) == 0
    assert (data / "runs" / row.id / "reanalysis.json").exists()


def test_a_lock_that_cannot_be_taken_is_refused_in_one_line(tmp_path, capsys):
    data = tmp_path / "data"
    (data / LOCK_NAME).mkdir(parents=True)  # the lock file cannot be opened (as read-only media would)
    assert main(["run", "quick-demo", "--sim", "--quiet", "--data", str(data)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot lock the data folder" in err[0]
    assert not (data / "catalog.sqlite").exists()  # nothing written, no device opened
