"""The chunked columnar trace reader and min/max decimation for display."""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from pycnoctl.controller.domain.devices import Reading, Validity
from pycnoctl.controller.record import runfolder
from pycnoctl.controller.record.decimate import decimate_minmax
from pycnoctl.controller.record.report import phase_breaks
from pycnoctl.controller.record.runfolder import RunRecorder, load_run

STATES = ("baseline", "fill", "settle_filled", "expand", "settle_expanded", "vent")


def _write(tmp_path, n: int, seed: int = 1):
    """A run whose values are awkward doubles (full 17-digit reprs, tiny and huge magnitudes)."""
    rng = np.random.default_rng(seed)
    p = 1e5 * rng.random(n) + rng.random(n) * 1e-9
    with RunRecorder(tmp_path, "R1", ["inlet", "vent"], {}, sync_in_background=False,
                     fsync_interval=1e9) as rec:
        for k in range(n):
            pr = (Reading(float(p[k]), "Pa", k) if k % 97 else Reading.invalid("Pa", k, Validity.GARBLED, "x"))
            temp = Reading(296.15 + float(rng.random()) * 1e-3, "K", k) if k % 5 else None
            rec.sample(k * 0.1 + 1e-12 * k, STATES[(k // 50) % len(STATES)], k // 300 or None,
                       {"inlet": k % 3 == 0, "vent": k % 7 == 0}, pr, temp, 101325.0 + float(rng.random()),
                       note="a, \"quoted\" note" if k == 11 else "")
    return tmp_path / "R1"


def _reference(path):
    """The whole-file reading, value by value with Python's float(), as the reader did before."""
    with open(path, encoding="utf-8", newline="") as fh:
        rows = list(csv.reader(fh))
    return rows[0], rows[1:]


@pytest.mark.parametrize("chunk", [7, 1000, runfolder.CHUNK_ROWS])
def test_chunked_reader_equals_python_parse_bit_for_bit(tmp_path, chunk):
    folder = _write(tmp_path, 1234)
    trace, torn = runfolder._read_trace(folder / "trace.csv", None, chunk_rows=chunk)
    header, body = _reference(folder / "trace.csv")
    assert not torn and list(trace) == header
    for j, name in enumerate(header):
        col = [r[j] for r in body]
        got = trace[name]
        if name in ("state", "pressure_valid", "temperature_valid", "note"):
            assert got.dtype == object and list(got) == col
        elif name == "cycle":
            assert got.tolist() == [int(x) if x else -1 for x in col]
        elif name.startswith("valve_"):
            assert got.dtype == np.int8 and got.tolist() == [int(x) for x in col]
        else:
            want = np.array([float(x) for x in col])
            # the same bits, not merely close: replay must repeat the live run's numbers exactly
            assert got.view(np.uint64).tolist() == want.view(np.uint64).tolist(), name


def test_text_columns_share_one_object_per_word(tmp_path):
    trace, _ = runfolder._read_trace(_write(tmp_path, 600) / "trace.csv", None, chunk_rows=64)
    assert len({id(x) for x in trace["state"]}) == len(set(trace["state"])) <= len(STATES)


@pytest.mark.parametrize("chunk", [5, 6, 1000])
def test_torn_tail_dropped_at_any_chunk_boundary(tmp_path, chunk):
    folder = _write(tmp_path, 30)
    path = folder / "trace.csv"
    whole = path.read_bytes()
    path.write_bytes(whole[:-9])  # the last row cut short, no newline
    run = load_run(folder)
    assert run.torn_tail and run.n_samples == 29
    trace, torn = runfolder._read_trace(path, None, chunk_rows=chunk)
    assert torn and trace["t"].size == 29
    last = whole[:-1].rfind(b"\n") + 1
    path.write_bytes(whole[:last] + b"3.0,fill\n")  # cut short but ending at a newline: too few fields
    trace, torn = runfolder._read_trace(path, None, chunk_rows=chunk)
    assert torn and trace["t"].size == 29


def test_malformed_row_in_a_later_chunk_names_its_line(tmp_path):
    folder = _write(tmp_path, 30)
    path = folder / "trace.csv"
    lines = path.read_text().splitlines(keepends=True)
    lines[20] = "1.0,fill\n"
    path.write_text("".join(lines))
    with pytest.raises(ValueError, match="malformed row 21"):
        runfolder._read_trace(path, None, chunk_rows=4)


def test_empty_and_header_only_traces(tmp_path):
    folder = _write(tmp_path, 3)
    path = folder / "trace.csv"
    path.write_text(path.read_text().splitlines(keepends=True)[0])
    trace, torn = runfolder._read_trace(path, None)
    assert not torn and trace["t"].size == 0 and trace["state"].dtype == object
    assert trace["valve_inlet"].dtype == np.int8 and trace["cycle"].dtype == np.int64
    path.write_text("t,sta")
    assert runfolder._read_trace(path, None) == ({}, True)


def _columns(t, columns):
    lo, hi = t.min(), t.max()
    return np.clip(np.floor((t - lo) * (columns / (hi - lo))), 0, columns - 1).astype(int)


def test_decimation_keeps_each_columns_min_max_and_phase_boundaries():
    rng = np.random.default_rng(3)
    n, columns = 200_000, 300
    t = np.cumsum(rng.random(n))
    y = np.cumsum(rng.normal(size=n))
    y[rng.integers(0, n, 40)] += 1e3 * rng.normal(size=40)  # spikes that must survive
    y[5000:5100] = np.nan  # a gap that must stay a gap
    states = np.array(STATES, dtype=object)[(np.arange(n) // 7777) % len(STATES)]
    breaks = phase_breaks(states)
    idx = decimate_minmax(t, y, columns, keep=np.concatenate((breaks - 1, breaks)))
    assert idx.size < 6 * columns + 2 * breaks.size and np.all(np.diff(idx) > 0)
    col, col_kept = _columns(t, columns), _columns(t, columns)[idx]
    for c in range(columns):
        full, kept = y[col == c], y[idx][col_kept == c]
        if np.isfinite(full).any():
            assert np.nanmax(kept) == np.nanmax(full) and np.nanmin(kept) == np.nanmin(full)
    assert set(breaks) <= set(idx) and set(breaks - 1) <= set(idx)
    assert {4999, 5000, 5099, 5100} <= set(idx)  # both ends of the gap
    assert idx[0] == 0 and idx[-1] == n - 1
    # the phase boundaries of the decimated series are the original's
    np.testing.assert_array_equal(idx[phase_breaks(states[idx])], breaks)


def test_decimation_of_short_series_keeps_everything_and_checks_arguments():
    t = np.arange(10.0)
    assert decimate_minmax(t, t, 5).tolist() == list(range(10))
    with pytest.raises(ValueError):
        decimate_minmax(t, t[:3], 5)
    with pytest.raises(ValueError):
        decimate_minmax(t, t, 0)
    flat = decimate_minmax(np.zeros(100), np.arange(100.0), 2)  # no time span: one column
    assert flat.tolist() == [0, 99]
    assert not math.isnan(float(flat.sum()))


def test_decimation_of_unordered_times_keeps_the_same_samples():
    rng = np.random.default_rng(5)
    t = np.sort(rng.random(5000))
    y = rng.normal(size=5000)
    y[100:120] = np.nan
    perm = rng.permutation(5000)
    sorted_idx = decimate_minmax(t, y, 50)
    shuffled_idx = decimate_minmax(t[perm], y[perm], 50)
    assert sorted(perm[shuffled_idx].tolist()) == sorted_idx.tolist()


def _same_trace(a, b):
    assert list(a) == list(b)
    for k in a:
        if a[k].dtype == object:
            assert b[k].dtype == object and list(a[k]) == list(b[k])
            assert all(type(x) is str for x in b[k][:50])
        else:
            assert a[k].dtype == b[k].dtype and a[k].tobytes() == b[k].tobytes(), k


def test_side_file_made_for_a_finished_run_and_read_while_current(tmp_path, monkeypatch):
    folder = _write(tmp_path, 500)
    side = folder / runfolder.SIDE_FILE
    first = load_run(folder)
    assert not side.exists()  # no summary.json: the run may still be going on
    (folder / "summary.json").write_text("{}")
    assert load_run(folder).trace["t"].size == 500 and side.exists()
    calls = []
    real = runfolder._read_trace
    monkeypatch.setattr(runfolder, "_read_trace", lambda *a, **kw: calls.append(1) or real(*a, **kw))
    again = load_run(folder)
    assert calls == [] and not again.torn_tail  # from the side file, bit for bit the same
    _same_trace(first.trace, again.trace)
    # the CSV changed after the side file was made: the CSV is the record, the side file is ignored
    with open(folder / "trace.csv", "a") as fh:
        fh.write(",".join(["99.0", "vent", "", "0", "0", "1.0", "valid", "nan", "absent", "1.0", ""]) + "\n")
    grown = load_run(folder)
    assert calls == [1] and grown.trace["t"].size == 501 and grown.trace["t"][-1] == 99.0


def test_side_file_of_another_size_or_broken_is_ignored(tmp_path):
    folder = _write(tmp_path, 50)
    (folder / "summary.json").write_text("{}")
    load_run(folder)
    side = folder / runfolder.SIDE_FILE
    side.write_bytes(b"not a zip")
    assert load_run(folder).trace["t"].size == 50  # read from the CSV, and the side file made again
    lines = (folder / "trace.csv").read_text().splitlines(keepends=True)
    (folder / "trace.csv").write_text("".join(lines[:-1]))
    import os
    st = side.stat()
    os.utime(side, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))  # newer, but made from a longer CSV
    assert load_run(folder).trace["t"].size == 49


def test_only_the_asked_columns_are_kept_from_csv_and_side_file(tmp_path):
    folder = _write(tmp_path, 300)
    want = ("t", "state", "pressure_pa")
    full = load_run(folder).trace
    part = load_run(folder, trace_columns=want).trace
    assert list(part) == list(want)
    (folder / "summary.json").write_text("{}")
    assert not (folder / runfolder.SIDE_FILE).exists()
    load_run(folder, trace_columns=want)
    assert not (folder / runfolder.SIDE_FILE).exists()  # a partial read makes no side file
    load_run(folder)
    from_side = load_run(folder, trace_columns=want).trace
    for tr in (part, from_side):
        assert list(tr) == list(want) and tr["t"].tobytes() == full["t"].tobytes()
        assert list(tr["state"]) == list(full["state"])
