"""Run reports rendered in a separate process, cached by run and by the content they are made from.

Why a process: rendering the report of a long trace is seconds of CPU and tens of megabytes.  In the
daemon's process it holds the GIL and stalls the control loop (a 577k-row trace once stalled it past
the stale limit and faulted the run in progress); in a spawned worker it has its own interpreter and
memory, and the caller only hands over a folder path and gets a future back.  One worker: reports are
rare, and a second would take the machine's other core from the control loop.

Why the cache key: a report is a function of trace.csv and summary.json (report.py reads only the
run folder), so (run id, their sizes and modification times) names its content without reading it.
"""

from __future__ import annotations

import multiprocessing
import threading
from concurrent.futures import Future, ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path

__all__ = ["ReportKey", "ReportWorker", "report_key"]


@dataclass(frozen=True)
class ReportKey:
    """What a report is made from: the run, and (size, mtime_ns) of its trace and summary (-1 if absent)."""

    run_id: str
    trace: tuple[int, int]
    summary: tuple[int, int]


def _stamp(path: Path) -> tuple[int, int]:
    try:
        st = path.stat()
    except FileNotFoundError:
        return (-1, -1)
    return (st.st_size, st.st_mtime_ns)


def report_key(folder: Path | str) -> ReportKey:
    folder = Path(folder)
    return ReportKey(folder.name, _stamp(folder / "trace.csv"), _stamp(folder / "summary.json"))


def _render(folder: str) -> str:
    """In the worker process: write the run's report.html (and PNG) in its folder; returns the HTML path."""
    from pycnoctl.controller.record.report import render_report

    return str(render_report(Path(folder)))


class ReportWorker:
    """Renders run reports in one spawned process; the same run and content are rendered once."""

    def __init__(self, max_workers: int = 1) -> None:
        ctx = multiprocessing.get_context("spawn")  # no fork of a threaded daemon, nothing inherited
        self._pool = ProcessPoolExecutor(max_workers=max_workers, mp_context=ctx)
        self._cache: dict[ReportKey, Future[str]] = {}
        self._lock = threading.Lock()

    def submit(self, folder: Path | str) -> Future[str]:
        """The future HTML path of the run's report; queued unless the same content is done or under way.

        A failed render is tried again on the next request (the folder may have been repaired)."""
        key = report_key(folder)
        with self._lock:
            fut = self._cache.get(key)
            if fut is None or fut.cancelled() or (fut.done() and fut.exception() is not None):
                for old in [k for k in self._cache if k.run_id == key.run_id]:
                    del self._cache[old]  # older content of this run: its report is out of date
                fut = self._pool.submit(_render, str(folder))
                self._cache[key] = fut
            return fut

    def status(self, folder: Path | str) -> str:
        """'none' (never asked for this content), 'pending', 'ready' or 'failed'."""
        with self._lock:
            fut = self._cache.get(report_key(folder))
        if fut is None:
            return "none"
        if not fut.done():
            return "pending"
        return "failed" if fut.cancelled() or fut.exception() is not None else "ready"

    def close(self) -> None:
        """Stop the worker; renders not started are cancelled."""
        self._pool.shutdown(wait=True, cancel_futures=True)

    def __enter__(self) -> ReportWorker:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
