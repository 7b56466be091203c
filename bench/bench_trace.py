"""`pycnoctl analyze` and `pycnoctl report` of a long trace: time and peak memory, old reader vs new.

Builds a real run (quick-demo on the simulator), then a long copy of it written through the run
recorder itself (so the format is the real one): the recorded rows, with a leak-hold-like stretch
of drifting, noisy pressure inserted before the last phase until the trace has ``--rows`` rows
(577,000 rows is 16 hours at 10 Hz).  Each measurement runs in a fresh process (peak RSS is
per process): the CLI verb, with either today's reader and full-resolution plot ("old", kept
below as it was), the chunked columnar reader and min/max-per-pixel plot ("new", from the CSV),
or the same once the first reader has left trace.npz beside the CSV ("npz").  Then the
growth of the new path from rows/10 to rows, and the cost of reading a numpy side file (.npz).

    python bench/bench_trace.py [--rows 577000]
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import io
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve()


# ------------------------------------------------------------------ the reader as it was (for "old")
def _legacy_read_trace(path: Path, columns: list[str] | None) -> tuple[dict[str, np.ndarray], bool]:
    """The whole-file reader this bench compares against (list(csv.reader) and zip(*rows))."""
    try:
        text = path.read_bytes().decode("utf-8", errors="replace")
    except FileNotFoundError:
        return {}, False
    torn = False
    if text and not text.endswith("\n"):
        text = text[: text.rfind("\n") + 1]
        torn = True
    rows = list(csv.reader(io.StringIO(text)))
    if not rows:
        return {}, torn
    header = rows[0]
    body = rows[1:]
    if body and len(body[-1]) != len(header):
        body = body[:-1]
        torn = True
    out: dict[str, np.ndarray] = {}
    cols = list(zip(*body, strict=True)) if body else [() for _ in header]
    for name, col in zip(header, cols, strict=True):
        if name in ("state", "pressure_valid", "temperature_valid", "note"):
            out[name] = np.array(col, dtype=object)
        elif name == "cycle":
            out[name] = np.array([int(x) if x else -1 for x in col], dtype=np.int64)
        elif name.startswith("valve_"):
            out[name] = np.array([int(x) for x in col], dtype=np.int8)
        else:
            out[name] = np.array([float(x) for x in col], dtype=float)
    return out, torn


def _rss_now() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def _peak_rss() -> int:
    """This process's own high-water RSS.  Not ru_maxrss: across fork and exec that keeps the
    parent's RSS at the fork, and this bench's parent holds a run of its own."""
    with open("/proc/self/status") as fh:
        for ln in fh:
            if ln.startswith("VmHWM:"):
                return int(ln.split()[1]) * 1024
    raise RuntimeError("no VmHWM in /proc/self/status")


def one(verb: str, mode: str, folder: str) -> None:
    """Child process: run one CLI verb on folder, print JSON with wall time and memory."""
    import matplotlib  # noqa: F401  (imported before the baseline: both modes pay it)

    from pycnoctl.controller.cli.main import main
    from pycnoctl.controller.record import report, runfolder

    if mode == "old":
        runfolder._read_trace = lambda path, columns, **kw: _legacy_read_trace(path, columns)
        runfolder._read_side = lambda *a: None
        report.decimate_minmax = lambda t, y, columns, keep=None: np.arange(len(t))
    argv = ["analyze", folder, "--json"] if verb == "analyze" else ["report", folder, "--out",
                                                                    str(Path(folder) / f"report-{mode}.html")]
    base = _rss_now()
    t0 = time.perf_counter()
    with contextlib.redirect_stdout(io.StringIO()) as out:
        rc = main(argv)
    wall = time.perf_counter() - t0
    peak = _peak_rss()
    digest = out.getvalue() if verb == "analyze" else ""
    print(json.dumps({"rc": rc, "wall": wall, "peak": peak, "above_start": peak - base, "out": digest}))


def measure(verb: str, mode: str, folder: Path) -> dict:
    """old and new: from the CSV (no side file yet); npz: the new path once the first reader has made one."""
    if mode != "npz":
        (folder / "trace.npz").unlink(missing_ok=True)
    elif not (folder / "trace.npz").exists():  # the report reads five columns and leaves none behind
        from pycnoctl.controller.record.runfolder import load_run

        load_run(folder)
    p = subprocess.run([sys.executable, str(HERE), "--one", verb, mode, str(folder)],
                       capture_output=True, text=True, check=True)
    return json.loads(p.stdout.strip().splitlines()[-1])


# ------------------------------------------------------------------ building the long run
def short_run(root: Path) -> Path:
    from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
    from pycnoctl.controller.record.catalog import Catalog
    from pycnoctl.controller.run.control import Controller
    from pycnoctl.drivers.simulated import build_sim_instrument

    cat = Catalog(root / "catalog.sqlite")
    inst = build_sim_instrument(None)
    s = execute(prepare(RunRequest("quick-demo", sample_id="BENCH-1", mass=13.2e-3), inst),
                Controller(inst), root=root / "runs", catalog=cat)
    cat.close()
    return root / "runs" / s["run_id"]


def long_run(src: Path, root: Path, rows: int, run_id: str) -> Path:
    """src's rows written again through RunRecorder, with a hold stretch making it `rows` long."""
    from pycnoctl.controller.domain.devices import Reading, Validity
    from pycnoctl.controller.record.runfolder import RunRecorder, load_run

    run = load_run(src)
    tr, names = run.trace, run.meta["valve_names"]
    n = run.n_samples
    extra = max(0, rows - n)
    last_phase = int(np.flatnonzero(tr["state"] != tr["state"][-1])[-1]) + 1
    rng = np.random.default_rng(7)
    dt = float(np.median(np.diff(tr["t"])))
    with RunRecorder(root, run_id, names, run.meta["meta"], sync_in_background=True) as rec:
        def copy(i: int, shift: float) -> None:
            p = (Reading(float(tr["pressure_pa"][i]), "Pa", 0.0) if tr["pressure_valid"][i] == "valid"
                 else Reading.invalid("Pa", 0.0, Validity(tr["pressure_valid"][i]), ""))
            temp = (None if tr["temperature_valid"][i] == "absent" else
                    Reading(float(tr["temperature_k"][i]), "K", 0.0) if tr["temperature_valid"][i] == "valid"
                    else Reading.invalid("K", 0.0, Validity(tr["temperature_valid"][i]), ""))
            cyc = int(tr["cycle"][i])
            rec.sample(float(tr["t"][i]) + shift, str(tr["state"][i]), None if cyc < 0 else cyc,
                       {v: bool(tr["valve_" + v][i]) for v in names}, p, temp, float(tr["ambient_pa"][i]),
                       str(tr["note"][i]))

        for i in range(last_phase):
            copy(i, 0.0)
        t = float(tr["t"][last_phase - 1])
        p0 = float(tr["pressure_pa"][last_phase - 1])
        amb = Reading(296.15, "K", 0.0)
        valves = {v: False for v in names}
        noise = rng.normal(0.0, 3.0, extra)
        for k in range(extra):
            t += dt
            rec.sample(t, "leak_hold", None, valves, Reading(p0 - 0.01 * k * dt + noise[k], "Pa", t), amb,
                       float(tr["ambient_pa"][last_phase - 1]))
        for i in range(last_phase, n):
            copy(i, t - float(tr["t"][last_phase - 1]))
    dst = root / run_id
    for name in ("cycles.csv", "summary.json"):
        shutil.copy(src / name, dst / name)
    return dst


def npz_cost(folder: Path) -> tuple[float, float, int, int]:
    """Seconds to read the CSV with the new reader, and a .npz of the same columns; their sizes."""
    from pycnoctl.controller.record.runfolder import _read_trace

    t0 = time.perf_counter()
    tr, _ = _read_trace(folder / "trace.csv", None)
    t_csv = time.perf_counter() - t0
    side = folder / "trace.npz"
    arrays = {}
    for k, v in tr.items():
        if v.dtype == object:
            cats, codes = np.unique(v.astype(str), return_inverse=True)
            arrays[k + ".codes"], arrays[k + ".words"] = codes.astype(np.int32), cats
        else:
            arrays[k] = v
    np.savez(side, **arrays)
    t0 = time.perf_counter()
    with np.load(side) as z:
        loaded = {k: z[k] for k in z.files}
    t_npz = time.perf_counter() - t0
    assert loaded["t"].tobytes() == tr["t"].tobytes()
    return t_csv, t_npz, (folder / "trace.csv").stat().st_size, side.stat().st_size


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=577_000)
    ap.add_argument("--one", nargs=3, metavar=("VERB", "MODE", "FOLDER"), help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.one:
        one(*a.one)
        return
    mb = 1 / 2**20
    with tempfile.TemporaryDirectory() as d:
        root = Path(d)
        src = short_run(root)
        t0 = time.perf_counter()
        big = long_run(src, root / "long", a.rows, "LONG")
        small = long_run(src, root / "long", a.rows // 10, "SHORT")
        print(f"wrote {a.rows} + {a.rows // 10} rows with RunRecorder in {time.perf_counter() - t0:.1f} s "
              f"(trace.csv {(big / 'trace.csv').stat().st_size * mb:.1f} MB)")
        res = {}
        for verb in ("analyze", "report"):
            for mode in ("old", "new", "npz"):
                res[verb, mode] = r = measure(verb, mode, big)
                print(f"{verb:<8} {mode}: {r['wall']:6.2f} s  peak RSS {r['peak'] * mb:6.1f} MB "
                      f"(+{r['above_start'] * mb:6.1f} MB over the process before the verb)  rc {r['rc']}")
            o, n = res[verb, "old"], res[verb, "new"]
            print(f"{verb:<8} new/old: time {n['wall'] / o['wall']:.2f}x  peak {n['peak'] / o['peak']:.2f}x")
            z = res[verb, "npz"]
            print(f"{verb:<8} npz/old: time {z['wall'] / o['wall']:.2f}x  peak {z['peak'] / o['peak']:.2f}x")
        same = res["analyze", "old"]["out"] == res["analyze", "new"]["out"] == res["analyze", "npz"]["out"]
        print(f"analyze output identical old vs new vs npz: {same}")
        print(f"growth, new path, {a.rows // 10} -> {a.rows} rows (10x):")
        for verb in ("analyze", "report"):
            s, b = measure(verb, "new", small), res[verb, "new"]
            print(f"  {verb:<8} time {b['wall'] / s['wall']:5.2f}x  peak RSS {b['peak'] / s['peak']:5.2f}x  "
                  f"memory above start {b['above_start'] / max(s['above_start'], 1):5.2f}x")
        t_csv, t_npz, size_csv, size_npz = npz_cost(big)
        print(f"side file: CSV read {t_csv:.2f} s ({size_csv * mb:.1f} MB), .npz read {t_npz:.3f} s "
              f"({size_npz * mb:.1f} MB)")


if __name__ == "__main__":
    main()
