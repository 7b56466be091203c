"""One `pycnoctl run quick-demo --sim` with the record, the catalog and the data-folder lock writing
through sim.storage's fault layer, and the checks every storage fault must pass.

Shared by tests/test_storage_faults.py (a stratified subset of N) and bench/bench_storage.py (every N).
"""

from __future__ import annotations

import contextlib
import io
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.jobs import measurement
from pycnoctl.controller.record import datalock, runfolder
from pycnoctl.controller.record.catalog import TERMINAL, Catalog, RunRow
from pycnoctl.controller.record.runfolder import RunRecorder, StoredRun, load_run
from pycnoctl.drivers import simulated
from pycnoctl.sim.storage import FaultyFiles, IoPlan, VolatileDisk, patch_writers

WRITERS = [runfolder, datalock, measurement]  # every module that writes the data folder from a run
SAFE = {"inlet": False, "vent": True}
CAUSES = ("disk full", "No space left", "I/O error", "Input/output error", "read-only")


@dataclass
class Outcome:
    """What one run under a fault plan left behind."""

    plan: IoPlan
    rc: int
    out: str
    err: str
    truth_at_close: dict[str, bool] | None  # the simulator's real valves when the run let go of them
    truth_final: dict[str, bool] | None
    acked_samples: int  # sample() calls that returned (the recorder acknowledged them)
    acked_events: int
    rows_before: list[RunRow] = field(default_factory=list)  # catalog rows as the run left them
    rows_after: list[RunRow] = field(default_factory=list)  # after the next writer took the folder
    stored: StoredRun | None = None


@contextlib.contextmanager
def _counting_recorder(counts: dict[str, int]) -> Iterator[None]:
    real_sample, real_event = RunRecorder.sample, RunRecorder.event

    def sample(self: RunRecorder, *a: Any, **kw: Any) -> None:
        real_sample(self, *a, **kw)
        counts["samples"] += 1

    def event(self: RunRecorder, *a: Any, **kw: Any) -> None:
        real_event(self, *a, **kw)
        counts["events"] += 1

    RunRecorder.sample, RunRecorder.event = sample, event  # type: ignore[method-assign]
    try:
        yield
    finally:
        RunRecorder.sample, RunRecorder.event = real_sample, real_event  # type: ignore[method-assign]


@contextlib.contextmanager
def _watched_instrument(seen: dict[str, Any]) -> Iterator[None]:
    real_build = simulated.build_sim_instrument

    def build(*a: Any, **kw: Any) -> Any:
        inst = real_build(*a, **kw)
        truth = inst.extras["sim"]
        seen["truth"] = truth
        real_close = inst.close

        def close() -> None:
            seen["at_close"] = dict(truth.actual_valves())  # before close() asserts the safe state itself
            real_close()

        inst.close = close
        return inst

    simulated.build_sim_instrument = build
    try:
        yield
    finally:
        simulated.build_sim_instrument = real_build


def run_once(root: Path, plan: IoPlan, disk: VolatileDisk | None = None,
             extra: Callable[[], None] | None = None) -> Outcome:
    """One quick-demo run on the simulator with its writes going through ``plan`` (and ``disk``)."""
    counts = {"samples": 0, "events": 0}
    seen: dict[str, Any] = {}
    out, err = io.StringIO(), io.StringIO()
    undo = patch_writers(FaultyFiles(plan, disk), WRITERS, Catalog)
    try:
        with _counting_recorder(counts), _watched_instrument(seen), contextlib.redirect_stdout(out), \
                contextlib.redirect_stderr(err):
            rc = main(["run", "quick-demo", "--sim", "--quiet", "--data", str(root)])
    finally:
        undo()
    truth = seen.get("truth")
    o = Outcome(plan, rc, out.getvalue(), err.getvalue(), seen.get("at_close"),
                dict(truth.actual_valves()) if truth is not None else None,
                counts["samples"], counts["events"])
    path = root / "catalog.sqlite"
    if path.exists():
        with Catalog.for_reading(path) as cat:
            o.rows_before = cat.list_runs(limit=None)
        with contextlib.redirect_stderr(io.StringIO()):  # the next writer: marks what was left running
            from pycnoctl.controller.cli.common import lock_data_folder

            lock_data_folder(root, "run").release()
        with Catalog.for_reading(path) as cat:
            o.rows_after = cat.list_runs(limit=None)
    folders = sorted((root / "runs").glob("R*")) if (root / "runs").exists() else []
    if folders and (folders[0] / "meta.json").exists():
        o.stored = load_run(folders[0])
    return o


def problems(o: Outcome, total: int) -> list[str]:
    """Everything a storage fault must not do (``total``: the writes of a clean run); empty when
    the run failed as it should."""
    bad: list[str] = []
    plan = o.plan
    text = o.out + o.err
    if "Traceback" in text or "Logging error" in text:
        bad.append("traceback on the terminal")
    lines = [ln for ln in o.err.splitlines() if ln.strip()]
    late = plan.fail_at == total  # emptying the lock file after a stored run: harmless
    if plan.fired is None or late:
        if o.rc != 0:
            bad.append(f"exit {o.rc} without a storage fault: {o.err.strip()[:200]}")
    else:
        if o.rc not in (3, 6):
            bad.append(f"exit {o.rc} (3 or 6 expected)")
        if len(lines) != 1:
            bad.append(f"{len(lines)} lines on stderr, one expected: {o.err.strip()[:300]}")
        elif not any(w in lines[0] for w in CAUSES):
            bad.append(f"the line does not say the cause: {lines[0][:200]}")
        if plan.fail_at is not None and not plan.fired:
            bad.append("the planned write never came")
    for name, valves in (("when the run let go", o.truth_at_close), ("at the end", o.truth_final)):
        if valves is not None and any(valves[k] != v for k, v in SAFE.items()):
            bad.append(f"valves not safe {name}: {valves}")
    if any(r.status not in TERMINAL for r in o.rows_after):
        bad.append(f"row left open after the next writer: {[(r.id, r.status) for r in o.rows_after]}")
    if not plan.persistent and any(r.status not in TERMINAL for r in o.rows_before):
        bad.append("a single failed write left the row open")
    for r in o.rows_before:
        if plan.fired is not None and not late and r.status == "completed":
            bad.append(f"row {r.id} completed although a write failed ({plan.fired})")
    if o.stored is not None:
        if o.stored.n_samples < o.acked_samples:
            bad.append(f"acknowledged samples lost: {o.stored.n_samples} of {o.acked_samples} readable")
        if len(o.stored.events) < o.acked_events:
            bad.append(f"acknowledged events lost: {len(o.stored.events)} of {o.acked_events} readable")
    elif o.acked_samples:
        bad.append("samples were acknowledged but the run folder is unreadable")
    return bad


def strata(kinds: list[str]) -> dict[str, list[int]]:
    """The writes of a clean run (1-based), by where they fall: start-up (before the first sample),
    trace rows, events, and bookkeeping (after the last sample)."""
    rows = [i + 1 for i, k in enumerate(kinds) if k == "write trace.csv"]
    first, last = rows[1], rows[-1]  # rows[0] is the header
    out: dict[str, list[int]] = {"start-up": [], "trace": [], "event": [], "bookkeeping": []}
    for i, k in enumerate(kinds, start=1):
        if i < first:
            out["start-up"].append(i)
        elif i > last:
            out["bookkeeping"].append(i)
        elif k == "write trace.csv":
            out["trace"].append(i)
        else:
            out["event"].append(i)
    return out
