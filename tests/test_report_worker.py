"""Reports rendered in a worker process: cached by content, and no stall of a run going on meanwhile."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pytest

from pycnoctl.controller.domain.devices import Reading
from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.runfolder import DamagedFile, RunRecorder
from pycnoctl.controller.record.worker import ReportWorker, report_key
from pycnoctl.controller.run.control import Controller
from pycnoctl.drivers.simulated import build_sim_instrument

STATES = ("baseline", "fill", "settle_filled", "expand", "settle_expanded", "vent")


def long_run(root: Path, run_id: str, rows: int) -> Path:
    """A finished run of `rows` samples written by the run recorder (format as recorded)."""
    rng = np.random.default_rng(11)
    p = 1e5 + np.cumsum(rng.normal(0, 5, rows))
    temp = Reading(296.15, "K", 0.0)
    with RunRecorder(root, run_id, ["inlet", "vent"], {}, sync_in_background=False, fsync_interval=1e9) as rec:
        for k in range(rows):
            rec.sample(k * 0.1, STATES[(k // 5000) % len(STATES)], k // 30000 + 1,
                       {"inlet": k % 2 == 0, "vent": False}, Reading(float(p[k]), "Pa", k * 0.1), temp, 101325.0)
        rec.write_summary(sequence={"name": "long"}, sequence_text="", instrument={"pressure_is_gauge": False},
                          calibration=None, results={"status": "completed", "sample_id": "LONG-1"})
    return root / run_id


@pytest.fixture(scope="module")
def worker():
    with ReportWorker() as w:
        yield w


def test_same_content_rendered_once_new_content_again(tmp_path: Path, worker: ReportWorker) -> None:
    folder = long_run(tmp_path, "R-A", 3000)
    assert worker.status(folder) == "none"
    fut = worker.submit(folder)
    assert worker.submit(folder) is fut  # the same run and content: one render
    html = Path(fut.result(timeout=120))
    assert html == folder / "report.html" and "LONG-1" in html.read_text()
    assert worker.status(folder) == "ready"
    key = report_key(folder)
    with open(folder / "trace.csv", "a") as fh:  # the trace grew: a new report
        fh.write("300.0,vent,,0,0,100000.0,valid,296.15,valid,101325.0,\n")
    assert report_key(folder) != key and worker.status(folder) == "none"
    again = worker.submit(folder)
    assert again is not fut
    again.result(timeout=120)


def test_failed_render_reported_and_tried_again(tmp_path: Path, worker: ReportWorker) -> None:
    missing = tmp_path / "R-none"
    missing.mkdir()
    fut = worker.submit(missing)
    with pytest.raises(DamagedFile, match="not a run folder"):
        fut.result(timeout=120)
    assert worker.status(missing) == "failed"
    assert worker.submit(missing) is not fut


def test_reports_of_long_traces_do_not_stall_a_run(tmp_path: Path) -> None:
    folders = [long_run(tmp_path / "old", f"R-LONG{i}", 150_000) for i in range(2)]
    inst = build_sim_instrument(None, realtime=True, speed=20.0)
    ctl = Controller(inst)
    ticks: list[float] = []
    plain_tick = ctl.tick

    def timed_tick():  # type: ignore[no-untyped-def]
        s = plain_tick()
        ticks.append(inst.clock.now())
        return s

    ctl.tick = timed_tick  # type: ignore[method-assign]
    cat = Catalog(tmp_path / "catalog.sqlite")
    with ReportWorker() as w:
        t0 = time.monotonic()
        futs = [w.submit(f) for f in folders]
        summary = execute(prepare(RunRequest("purge-only"), inst), ctl, root=tmp_path / "runs", catalog=cat)
        run_wall = time.monotonic() - t0
        done_during_run = [f.done() for f in futs]
        paths = [Path(f.result(timeout=300)) for f in futs]
    cat.close()
    assert summary["status"] == "completed"
    assert all(done_during_run), f"the reports took longer than the run ({run_wall:.1f} s): nothing was tested"
    assert all(p.exists() and p.with_suffix(".png").exists() for p in paths)
    gaps = np.diff(ticks)
    limit = inst.limits.stale_after
    assert gaps.max() < limit, f"worst tick gap {gaps.max():.2f} s of simulated time (stale limit {limit} s)"
