"""Kill writers with SIGKILL at random moments; nothing acknowledged may be lost.

Catalog: SQLite promises that a committed transaction survives a crash (WAL, synchronous=FULL:
SQLite documentation "Write-Ahead Logging", "PRAGMA synchronous").  Trace: a flushed row is in
the kernel's page cache, which a process kill does not discard (POSIX write semantics).
"""

from __future__ import annotations

import os
import random
import select
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np

from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.runfolder import load_run

CATALOG_WRITER = textwrap.dedent(
    """
    import sys
    from pycnoctl.controller.record.catalog import Catalog
    cat = Catalog(sys.argv[1])
    print("ready", flush=True)
    i = 0
    while True:
        rid = cat.create_run(kind="measurement", sample_id="kill-test")
        print("run", rid, flush=True)
        cat.add_cycle(rid, i, 1.5e5, 8.0e4, 5.0e-6, True)
        print("cycle", rid, i, flush=True)
        cat.update_status(rid, "running")
        print("status", rid, flush=True)
        i += 1
    """
)

TRACE_WRITER = textwrap.dedent(
    """
    import sys
    from pathlib import Path
    from pycnoctl.controller.record.runfolder import RunRecorder
    from pycnoctl.controller.domain.devices import Reading
    rec = RunRecorder(Path(sys.argv[1]), sys.argv[2], ["inlet", "vent"], {})
    print("ready", flush=True)
    k = 0
    while True:
        t = k * 0.1
        rec.sample(t, "fill", 1, {"inlet": True, "vent": False}, Reading(1.0e5 + k, "Pa", t),
                   note="x" * (k % 50))
        print(k, flush=True)
        k += 1
    """
)


def _run_and_kill(args: list[str], delay: float) -> list[str]:
    """Start a writer, wait for 'ready', let it write for `delay` s, SIGKILL it; return its lines."""
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    proc = subprocess.Popen([sys.executable, "-c", *args], stdout=subprocess.PIPE, env=env)
    assert proc.stdout is not None
    fd = proc.stdout.fileno()  # raw reads only: a buffered readline would hide data from os.read
    out = b""
    while b"\n" not in out:
        chunk = os.read(fd, 1 << 16)
        assert chunk, "writer died before it was ready"
        out += chunk
    first, out = out.split(b"\n", 1)
    assert first == b"ready", first
    deadline = time.monotonic() + delay
    while (left := deadline - time.monotonic()) > 0:  # drain while it writes, so the pipe never fills
        r, _, _ = select.select([fd], [], [], left)
        if r:
            out += os.read(fd, 1 << 16)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    while chunk := os.read(fd, 1 << 16):
        out += chunk
    proc.stdout.close()
    lines = out.decode().split("\n")
    return lines[:-1]  # the last element is empty or an unfinished acknowledgement


def test_catalog_survives_sigkill_without_losing_acknowledged_records(tmp_path):
    path = tmp_path / "catalog.sqlite"
    rng = random.Random(20250101)
    acked_runs: set[str] = set()
    acked_cycles: set[tuple[str, int]] = set()
    acked_status: set[str] = set()
    t_start = time.monotonic()
    kills = 0
    while kills < 30 and time.monotonic() - t_start < 18.0:
        for line in _run_and_kill([CATALOG_WRITER, str(path)], rng.uniform(0.0, 0.15)):
            parts = line.split()
            if parts[0] == "run":
                acked_runs.add(parts[1])
            elif parts[0] == "cycle":
                acked_cycles.add((parts[1], int(parts[2])))
            elif parts[0] == "status":
                acked_status.add(parts[1])
        kills += 1
    assert kills >= 20, f"only {kills} kills fitted in the time box"
    assert len(acked_runs) > 50  # the writers really wrote
    cat = Catalog(path)
    try:
        assert cat.integrity_check() == "ok"
        stored = {r.id: r for r in cat.list_runs(limit=10**6)}
        assert acked_runs <= stored.keys()
        for rid in acked_status:
            assert stored[rid].status == "running"
        for rid, idx in acked_cycles:
            assert idx in {c.idx for c in cat.get_cycles(rid)}
    finally:
        cat.close()


def test_trace_survives_sigkill_up_to_the_last_acknowledged_sample(tmp_path):
    rng = random.Random(7)
    for n in range(5):
        run_id = f"kill-{n}"
        lines = _run_and_kill([TRACE_WRITER, str(tmp_path), run_id], rng.uniform(0.05, 0.3))
        acked = [int(x) for x in lines]
        assert acked == list(range(len(acked))) and acked
        run = load_run(tmp_path / run_id)
        n_rows = run.n_samples
        assert n_rows >= len(acked)  # every acknowledged row is there
        assert n_rows <= len(acked) + 1  # plus at most the one in flight
        np.testing.assert_array_equal(run.trace["pressure_pa"][: len(acked)], 1.0e5 + np.arange(len(acked)))
