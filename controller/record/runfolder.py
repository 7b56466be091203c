"""The complete raw record of one run, in a folder of plain files that outlive the software.

root/<run_id>/
  meta.json      written once at creation (atomically): run id, valve names, columns, meta (a run's
                 sequence text, gas, calibration record and instrument facts: what a recomputation of
                 the trace needs when the run was killed before summary.json was written)
  trace.csv      every sample, appended; header then one row per sample
  events.jsonl   state changes, trips, warnings, operator actions; one JSON object a line
  cycles.csv     one row per cycle, rewritten atomically whenever a cycle completes
  summary.json   sequence (parsed model and raw text), instrument, calibration, version, results
  trace.npz      a cache of trace.csv as numpy columns, made by the first reader of a finished run;
                 read only while newer than the CSV (the CSV stays the record)

Crash guarantee.  Every trace row goes to the operating system in one unbuffered write, and
every event line is written and ``flush()``-ed, so each is in the page cache before
``sample()``/``event()`` returns: a crash of the
process (exception, SIGKILL) loses at most the row in flight, which ``load_run`` drops as a
torn tail.  ``os.fsync`` runs on trace and events every ``fsync_interval`` seconds (wall time),
promptly after every event, on ``sync()`` and on ``close()``: a power loss or kernel crash loses
at most the last ``fsync_interval`` seconds.  By default the periodic and per-event fsyncs run in
a background thread, because one fsync can take a hundred milliseconds on a busy disk and must not
delay the control loop's tick; an fsync error found there is raised by the next ``sample()``.  cycles.csv,
summary.json and meta.json are replaced atomically (write a temporary file, fsync, os.replace,
fsync the folder): a reader sees the old or the new file, never a mixture.

Any OSError while writing raises RecordWriteError naming what was not saved; the engine treats
it as fatal (safe state).
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import datetime as _dt
import functools
import io
import itertools
import json
import math
import os
import re
import threading
import time
import zipfile
from collections.abc import Callable, Collection, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pycnoctl.controller.domain.devices import Reading, Validity
from pycnoctl.controller.domain.figures import covariance_problem, is_number

__all__ = [
    "CYCLE_COLUMNS",
    "CycleRecord",
    "RecordWriteError",
    "RunRecorder",
    "StoredRun",
    "load_run",
    "software_version",
    "trace_columns",
]

#: The trace's word for each validity (an enum's .value goes through a descriptor: twice a row)
_VALIDITY_WORD = {v: v.value for v in Validity}
_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,79}$")
_VALVE_PREFIX = "valve_"


class RecordWriteError(OSError):
    """A part of the run record could not be written; ``what`` says which."""

    def __init__(self, what: str, path: Path | str, cause: BaseException | None = None) -> None:
        self.what = what
        self.path = str(path)
        detail = f": {cause}" if cause is not None else ""
        super().__init__(f"not saved: {what} ({self.path}){detail}")


@functools.cache
def software_version() -> str:
    """The installed pycnoctl version, recorded with every run (looked up once per process: the
    package metadata search costs about a millisecond, and the version cannot change under a
    running process)."""
    try:
        from importlib.metadata import PackageNotFoundError, version
    except ImportError:  # pragma: no cover
        return "unknown"
    try:
        return version("pycnoctl")
    except PackageNotFoundError:
        return "unknown"


def _utc_now() -> str:
    return _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def trace_columns(valve_names: Sequence[str]) -> list[str]:
    return (
        ["t", "state", "cycle"]
        + [_VALVE_PREFIX + v for v in valve_names]
        + ["pressure_pa", "pressure_valid", "temperature_k", "temperature_valid", "ambient_pa", "note"]
    )


CYCLE_COLUMNS = [
    "index", "baseline_pa", "p1_pa", "p2_pa", "t1", "t2", "settle1_s", "settle2_s",
    "drift1_pa_s", "drift2_pa_s", "volume_m3", "u_volume_m3", "flags", "kept",
]  # fmt: skip


@dataclass
class CycleRecord:
    """One fill-expand cycle as recorded (pressures gauge Pa, times s, volume m^3)."""

    index: int
    baseline_pa: float
    p1_pa: float
    p2_pa: float
    t1: float
    t2: float
    settle1_s: float
    settle2_s: float
    drift1_pa_s: float
    drift2_pa_s: float
    volume_m3: float
    u_volume_m3: float
    flags: Sequence[str] = field(default_factory=tuple)
    kept: bool = True

    def row(self) -> list[str]:
        vals: list[str] = []
        for name in CYCLE_COLUMNS:
            v = getattr(self, name)
            if name == "flags":
                vals.append(";".join(str(f) for f in v))
            elif name == "kept":
                vals.append("1" if v else "0")
            elif name == "index":
                vals.append(str(int(v)))
            else:
                vals.append(repr(float(v)))
        return vals


def _plain(s: str) -> str:
    """A trace field as CSV: plain words pass as they are; anything else is quoted by the csv module."""
    if not s or s.isidentifier():
        return s
    buf = io.StringIO()
    csv.writer(buf, lineterminator="").writerow([_clean_text(s)])
    return buf.getvalue()


def _clean_text(s: str) -> str:
    """Free text goes on one line so a torn row can always be told from a whole one."""
    return s.replace("\r", " ").replace("\n", " ")


_UNSET = object()  # a field whose text has not been made yet


def _write_all(fh: Any, data: bytes) -> None:
    """All of data to an unbuffered file (a raw write may take only part of it)."""
    n = fh.write(data)
    if n == len(data):  # nearly always: one row is far below a pipe's or a disk's atomic size
        return
    if not n:
        raise OSError(f"write to {getattr(fh, 'name', fh)!r} took no bytes")
    view = memoryview(data)[n:]
    while view:
        n = fh.write(view)
        if not n:
            raise OSError(f"write to {getattr(fh, 'name', fh)!r} took no bytes")
        view = view[n:]


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def atomic_write(path: Path, data: bytes) -> None:
    """Replace ``path`` with ``data`` so that a reader or a power loss sees the old file or the new one."""
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    _fsync_dir(path.parent)


def _json_default(obj: Any) -> Any:
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return dataclasses.asdict(obj)
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, _dt.datetime):
        return obj.isoformat()
    if hasattr(obj, "model_dump"):  # pydantic models
        return obj.model_dump(mode="json")
    if hasattr(obj, "value") and hasattr(obj, "name"):  # enums
        return obj.value
    raise TypeError(f"cannot record {type(obj).__name__} as JSON")


def _dumps(obj: Any, **kw: Any) -> str:
    return json.dumps(obj, default=_json_default, ensure_ascii=False, **kw)


class RunRecorder:
    """Writes one run's folder; every method either saves its data or raises RecordWriteError."""

    def __init__(
        self,
        root: Path,
        run_id: str,
        valve_names: Sequence[str],
        meta: dict,
        *,
        fsync_interval: float = 1.0,
        wall_clock: Callable[[], float] = time.monotonic,
        sync_in_background: bool = True,
    ) -> None:
        if not _SAFE_NAME.match(run_id) or ".." in run_id:
            raise ValueError(f"run id {run_id!r} is not a safe folder name")
        names = list(valve_names)
        for v in names:
            if not re.match(r"^[A-Za-z0-9_-]+$", v):
                raise ValueError(f"valve name {v!r}: letters, digits, '_' and '-' only")
        if len(set(names)) != len(names):
            raise ValueError("duplicate valve names")
        self.run_id = run_id
        self.valve_names = tuple(names)
        self.columns = trace_columns(names)
        self.folder = Path(root) / run_id
        self.fsync_interval = fsync_interval
        self._clock = wall_clock
        self._closed = False
        self._n_samples = 0
        try:
            new_root = not Path(root).exists()
            Path(root).mkdir(parents=True, exist_ok=True)
            self.folder.mkdir()
            # the folder's own entry must be durable too, or a power loss can drop the whole run
            _fsync_dir(Path(root))
            if new_root:
                _fsync_dir(Path(root).parent)
        except OSError as exc:
            raise RecordWriteError("run folder", self.folder, exc) from exc
        self.meta = {
            "run_id": run_id,
            "created": _utc_now(),
            "software_version": software_version(),
            "valve_names": list(names),
            "trace_columns": self.columns,
            "meta": meta,
        }
        self._write_atomic("meta.json", (_dumps(self.meta, indent=2) + "\n").encode())
        self.trace_path = self.folder / "trace.csv"
        self.events_path = self.folder / "events.jsonl"
        try:
            # long-lived handles, closed in close().  The trace is unbuffered: each row is one
            # write() straight to the operating system, the cheapest form of "flushed as taken".
            self._trace = open(self.trace_path, "xb", buffering=0)  # noqa: SIM115
            self._events = open(self.events_path, "x", encoding="utf-8", newline="")  # noqa: SIM115
            header = io.StringIO()
            csv.writer(header, lineterminator="\n").writerow(self.columns)
            _write_all(self._trace, header.getvalue().encode())
            os.fsync(self._trace.fileno())
            _fsync_dir(self.folder)
        except OSError as exc:
            raise RecordWriteError("trace/events files", self.folder, exc) from exc
        self._last_sync = self._clock()
        self._syncer = _Syncer((self._trace, self._events), fsync_interval) if sync_in_background else None
        # the text of fields that seldom change between rows, kept with what it was made from
        self._valves_seen: dict[str, bool] | None = None
        self._valves_text = ""
        self._words: dict[str, str] = {}
        self._temp_seen: object = _UNSET
        self._temp_text = ""
        self._ambient_seen: object = _UNSET
        self._ambient_text = ""

    # ------------------------------------------------------------------ raw trace
    @property
    def n_samples(self) -> int:
        return self._n_samples

    def sample(
        self,
        t: float,
        state: str,
        cycle: int | None,
        valves: Mapping[str, bool],
        pressure: Reading,
        temperature: Reading | None = None,
        ambient_pa: float | None = None,
        note: str = "",
    ) -> None:
        """Append one sample row and flush it (an invalid reading is written as nan + its flag)."""
        if temperature is not self._temp_seen:  # a thermometer is read a few times a second at most
            self._temp_seen = temperature
            self._temp_text = ("nan,absent" if temperature is None
                               else f"{float(temperature.value)!r},{_VALIDITY_WORD[temperature.validity]}")
        if ambient_pa is not self._ambient_seen:  # the same object until the barometer is read again
            self._ambient_seen = ambient_pa
            self._ambient_text = "nan" if ambient_pa is None else repr(float(ambient_pa))
        if valves != self._valves_seen:
            self._valves_seen = dict(valves)
            self._valves_text = ",".join("1" if valves.get(v, False) else "0" for v in self.valve_names)
        word = self._words.get(state)
        if word is None:
            word = self._words[state] = _plain(state)
        # one line built directly (every field is a number or a plain word; free text goes through csv)
        line = (f"{float(t)!r},{word},{'' if cycle is None else int(cycle)},{self._valves_text},"
                f"{float(pressure.value)!r},{_VALIDITY_WORD[pressure.validity]},{self._temp_text},"
                f"{self._ambient_text},{_plain(note) if note else ''}\n")
        if self._syncer is not None and self._syncer.error is not None:
            raise RecordWriteError("background fsync", self.trace_path, self._syncer.error)
        try:
            _write_all(self._trace, line.encode())
            if self._syncer is None:
                now = self._clock()
                if now - self._last_sync >= self.fsync_interval:
                    os.fsync(self._trace.fileno())
                    self._last_sync = now
        except (OSError, ValueError) as exc:  # ValueError: file already closed
            raise RecordWriteError(f"trace sample t={t!r}", self.trace_path, exc) from exc
        self._n_samples += 1

    # ------------------------------------------------------------------ events
    def event(self, kind: str, t: float | None, message: str = "", **data: Any) -> None:
        """Append one event line (state change, trip, warning, operator action); flushed and fsynced.

        State changes (kind 'state') also fsync the trace: a phase boundary is always durable.
        """
        rec = {"kind": kind, "t": t, "wall": _utc_now(), "message": message, **data}
        try:
            line = _dumps(rec, allow_nan=True)
            self._events.write(line + "\n")
            self._events.flush()
            if self._syncer is not None:
                self._syncer.request()
            else:
                os.fsync(self._events.fileno())
                if kind == "state":
                    os.fsync(self._trace.fileno())
                    self._last_sync = self._clock()
        except (OSError, ValueError) as exc:
            raise RecordWriteError(f"event {kind!r} t={t!r}", self.events_path, exc) from exc
        except TypeError as exc:
            raise ValueError(f"event data not recordable: {exc}") from exc

    # ------------------------------------------------------------------ cycles and summary
    def write_cycles(self, cycles: Iterable[CycleRecord | Mapping[str, Any]]) -> None:
        """Rewrite cycles.csv atomically with every cycle so far."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(CYCLE_COLUMNS)
        for c in cycles:
            rec = c if isinstance(c, CycleRecord) else CycleRecord(**dict(c))
            w.writerow(rec.row())
        self._write_atomic("cycles.csv", buf.getvalue().encode())

    def write_summary(
        self,
        *,
        sequence: Mapping[str, Any] | Any,
        sequence_text: str,
        instrument: Mapping[str, Any] | Any,
        calibration: Mapping[str, Any] | Any | None,
        results: Mapping[str, Any] | Any,
        extra: Mapping[str, Any] | None = None,
    ) -> None:
        """Write summary.json atomically: enough to re-analyse the run without the software's config."""
        doc = {
            "run_id": self.run_id,
            "written": _utc_now(),
            "software_version": software_version(),
            "sequence": sequence,
            "sequence_text": sequence_text,
            "instrument": instrument,
            "calibration": calibration,
            "results": results,
            **(dict(extra) if extra else {}),
        }
        try:
            text = _dumps(doc, indent=2, allow_nan=True)
        except TypeError as exc:
            raise ValueError(f"summary not recordable: {exc}") from exc
        self._write_atomic("summary.json", (text + "\n").encode())

    def _write_atomic(self, name: str, data: bytes) -> None:
        path = self.folder / name
        try:
            atomic_write(path, data)
        except OSError as exc:
            with contextlib.suppress(OSError):
                path.with_name(f".{name}.tmp").unlink()
            raise RecordWriteError(name, path, exc) from exc

    # ------------------------------------------------------------------ durability
    def sync(self) -> None:
        """fsync trace and events now (the engine calls this on phase changes too)."""
        try:
            for fh in (self._trace, self._events):
                fh.flush()
                os.fsync(fh.fileno())
        except (OSError, ValueError) as exc:
            raise RecordWriteError("trace/events sync", self.folder, exc) from exc
        self._last_sync = self._clock()

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        err: BaseException | None = None
        if self._syncer is not None:
            self._syncer.stop()
            err = self._syncer.error
        for fh in (self._trace, self._events):
            try:
                fh.flush()
                os.fsync(fh.fileno())
            except (OSError, ValueError) as exc:
                err = err or exc
            finally:
                with contextlib.suppress(OSError):
                    fh.close()
        if err is not None:
            raise RecordWriteError("final flush of trace/events", self.folder, err) from err

    def __enter__(self) -> RunRecorder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class _Syncer:
    """fsyncs the open record files every interval and whenever asked, off the caller's thread."""

    #: Requests closer together than this share one fsync: a burst of events (a fast simulated run
    #: changes state many times a second) must not turn into an fsync storm that stalls the writer.
    MIN_GAP = 0.25

    def __init__(self, files: Sequence[Any], interval: float) -> None:
        self._files = tuple(files)
        self._interval = interval
        self._last = time.monotonic()
        self._kick = threading.Event()
        self._stop = threading.Event()
        self.error: BaseException | None = None
        self.count = 0
        self._thread = threading.Thread(target=self._run, name="record-fsync", daemon=True)
        self._thread.start()

    def request(self) -> None:
        self._kick.set()

    def _run(self) -> None:
        while True:
            self._kick.wait(self._interval)
            if self._stop.is_set():
                return
            gap = time.monotonic() - self._last
            # the coalescing pause waits on the stop flag, so close() is never held up by it
            if gap < self.MIN_GAP and self._stop.wait(self.MIN_GAP - gap):
                return
            self._kick.clear()
            for fh in self._files:
                try:
                    os.fsync(fh.fileno())
                except ValueError:  # closed under us at shutdown
                    return
                except OSError as exc:
                    self.error = self.error or exc
            self.count += 1
            self._last = time.monotonic()

    def stop(self) -> None:
        self._stop.set()
        self._kick.set()
        self._thread.join(timeout=10.0)


# ---------------------------------------------------------------------------- reading back


class DamagedFile(ValueError):
    """A run-folder file that is there but cannot be read as what it should be.

    The file's name and what is wrong are kept apart from its path, so that a server can say which
    file of which run is damaged without showing a path on its machine.
    """

    def __init__(self, path: Path | str, detail: str) -> None:
        super().__init__(str(path), detail)  # both in args: the exception pickles (report worker)
        self.path = Path(path)
        self.name = self.path.name
        self.detail = detail

    def __str__(self) -> str:
        return f"{self.path}: {self.detail}"


def _read_json(path: Path) -> dict | None:
    """A JSON object file of the run folder; None when it is absent, DamagedFile when it is not one."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None
    except UnicodeDecodeError:
        raise DamagedFile(path, "not UTF-8 text") from None
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise DamagedFile(path, f"not JSON ({exc.msg} at line {exc.lineno} column {exc.colno})") from None
    except RecursionError:
        raise DamagedFile(path, "JSON nested too deeply to read") from None
    if not isinstance(doc, dict):
        raise DamagedFile(path, f"not a JSON object (a {type(doc).__name__})")
    return doc


@dataclass
class StoredRun:
    """A run folder read back: raw trace as numpy arrays (one per column), events, cycles, summary."""

    folder: Path
    meta: dict
    trace: dict[str, np.ndarray]
    events: list[dict]
    cycles: list[dict]
    summary: dict | None
    torn_tail: bool  # the trace's last line was cut short (crash mid-write) and was dropped
    torn_events: bool

    @property
    def n_samples(self) -> int:
        return int(self.trace["t"].size) if "t" in self.trace else 0

    def valves(self) -> dict[str, np.ndarray]:
        names = self.meta.get("valve_names", [])
        return {v: self.trace[_VALVE_PREFIX + v].astype(bool) for v in names}


_TEXT_COLUMNS = {"state", "pressure_valid", "temperature_valid", "note"}

#: Rows parsed at a time: the Python objects of one chunk (about 1 KB a row) are all that is ever alive
#: at once, so reading costs the numpy arrays plus a few megabytes whatever the trace's length.
CHUNK_ROWS = 4096


class _Column:
    """One trace column being filled chunk by chunk: numbers as numpy arrays, words as codes."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.parts: list[np.ndarray] = []
        self.words: dict[str, int] | None = {} if name in _TEXT_COLUMNS else None

    def add(self, col: tuple[str, ...]) -> None:
        name, words = self.name, self.words
        if words is not None:  # a handful of distinct words a run: one small integer code per row
            self.parts.append(np.fromiter((words.setdefault(x, len(words)) for x in col),
                                          dtype=np.int32, count=len(col)))
        elif name == "cycle":
            self.parts.append(np.array([int(x) if x else -1 for x in col], dtype=np.int64))
        elif name.startswith(_VALVE_PREFIX):
            self.parts.append(np.array([int(x) for x in col], dtype=np.int8))
        else:  # numpy parses the repr() text to the same double as float() (a test checks it)
            self.parts.append(np.array(col, dtype=float))

    def array(self) -> np.ndarray:
        """The whole column; the chunks are let go as it is made, so only one column is ever twice in memory."""
        parts, self.parts = self.parts, []
        if self.words is not None:
            # one shared str object per distinct word: an object array of references, 8 bytes a row,
            # that compares with "valid" and iterates as str like the old per-row strings did
            cats = np.empty(len(self.words), dtype=object)
            cats[:] = list(self.words)
            codes = np.concatenate(parts) if parts else np.empty(0, dtype=np.int32)
            del parts
            return cats[codes]
        if parts:
            return np.concatenate(parts)
        dtype = np.int64 if self.name == "cycle" else np.int8 if self.name.startswith(_VALVE_PREFIX) else float
        return np.empty(0, dtype=dtype)


def _read_trace(path: Path, columns: list[str] | None, chunk_rows: int = CHUNK_ROWS,
                side: Path | None = None, only: frozenset[str] | None = None) -> tuple[dict[str, np.ndarray], bool]:
    """The trace as one numpy array per column, parsed CHUNK_ROWS lines at a time.

    Each row is one line (free text is put on one line when written), so a chunk of lines is a
    chunk of rows.  A last line without its newline, or a last row with the wrong number of
    fields, is a torn tail and is dropped; a wrong row anywhere else is an error.
    """
    try:
        fh = open(path, encoding="utf-8", errors="replace", newline="")  # noqa: SIM115
    except FileNotFoundError:
        return {}, False
    with fh:
        first = fh.readline()
        if not first.endswith("\n"):
            return {}, bool(first)  # no header, or a torn one
        header = next(csv.reader([first]))
        if columns is not None and header != columns:
            raise DamagedFile(path, "header does not match meta.json trace_columns")
        cols = [_Column(name) for name in header]
        torn = False
        row_no = 1  # of the header; rows are numbered as lines of the file

        def read() -> list[str]:
            return list(itertools.islice(fh, chunk_rows))

        chunk = read()
        while chunk:
            nxt = read()  # one chunk ahead, to know whether this one holds the file's last row
            if not nxt and not chunk[-1].endswith("\n"):
                chunk.pop()
                torn = True
            rows = list(csv.reader(chunk))
            if not nxt and rows and len(rows[-1]) != len(header):  # torn row that ended at a newline
                rows.pop()
                torn = True
            for i, r in enumerate(rows):
                if len(r) != len(header):
                    raise DamagedFile(path, f"malformed row {row_no + i + 1}")
            row_no += len(rows)
            if rows:
                for c, col in zip(cols, zip(*rows, strict=True), strict=True):
                    if only is None or c.name in only:
                        try:
                            c.add(col)
                        except ValueError:
                            raise DamagedFile(path, f"column {c.name!r} has a value that is not a number in "
                                                    f"rows {row_no - len(rows) + 1}-{row_no}") from None
            del rows
            chunk = nxt
    size = path.stat().st_size
    trace = {c.name: c.array() for c in cols if only is None or c.name in only}
    if side is not None and not torn and only is None:
        _write_side(side, header, trace, size)
    return trace, torn


# A finished run's trace is also kept as trace.npz, a cache beside the CSV (never instead of it):
# the CSV stays the record.  Reading 577k rows from the CSV takes about 2 s, from the .npz a few
# hundredths (bench/bench_trace.py).  It is written by the first reader of a finished run (one with
# summary.json), so nothing is added to the control process at the end of a run; it is read only when
# it is newer than the CSV and was made from a CSV of the CSV's present size.
SIDE_FILE = "trace.npz"


def _write_side(side: Path, header: list[str], trace: dict[str, np.ndarray], csv_size: int) -> None:
    arrays: dict[str, np.ndarray] = {"_columns": np.array(header), "_csv_size": np.array(csv_size)}
    for name, col in trace.items():
        if col.dtype == object:
            words: dict[str, int] = {}
            arrays[name + ".codes"] = np.fromiter((words.setdefault(x, len(words)) for x in col),
                                                  dtype=np.int32, count=col.size)
            arrays[name + ".words"] = np.array(list(words), dtype=str)
        else:
            arrays[name] = col
    tmp = side.with_name(f".{side.name}.tmp")
    try:  # a cache: a folder we may not write to, or a full disk, costs only the speed-up
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)
        os.replace(tmp, side)
    except OSError:
        with contextlib.suppress(OSError):
            tmp.unlink()


def _read_side(side: Path, path: Path, columns: list[str] | None,
               only: frozenset[str] | None = None) -> dict[str, np.ndarray] | None:
    """The trace from its side file, or None when there is none that is current."""
    try:
        st_side, st_csv = side.stat(), path.stat()
    except OSError:
        return None
    if st_side.st_mtime_ns <= st_csv.st_mtime_ns:
        return None
    try:
        with np.load(side, allow_pickle=False) as z:
            header = [str(x) for x in z["_columns"]]
            if int(z["_csv_size"]) != st_csv.st_size or (columns is not None and header != columns):
                return None
            out: dict[str, np.ndarray] = {}
            for name in header:
                if only is not None and name not in only:
                    continue
                if name in _TEXT_COLUMNS:
                    cats = np.empty(len(z[name + ".words"]), dtype=object)
                    cats[:] = [str(w) for w in z[name + ".words"]]
                    out[name] = cats[z[name + ".codes"]]
                else:
                    out[name] = z[name]
            return out
    except (OSError, ValueError, KeyError, zipfile.BadZipFile):
        return None


def _read_events(path: Path) -> tuple[list[dict], bool]:
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except FileNotFoundError:
        return [], False
    events = []
    torn = False
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    elif lines:
        lines.pop()  # no newline: torn
        torn = True
    for ln in lines:
        try:
            events.append(json.loads(ln))
        except json.JSONDecodeError:
            torn = True
    return events, torn


def _read_cycles(path: Path) -> list[dict]:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return []
    rows = list(csv.DictReader(io.StringIO(text)))
    out = []
    for r in rows:
        d: dict[str, Any] = {}
        for k, v in r.items():
            if k == "index":
                d[k] = int(v)
            elif k == "kept":
                d[k] = v == "1"
            elif k == "flags":
                d[k] = [f for f in v.split(";") if f]
            else:
                d[k] = float(v) if v else math.nan
        out.append(d)
    return out


def load_run(folder: Path | str, trace_columns: Collection[str] | None = None) -> StoredRun:
    """Read a run folder back; tolerant of a torn last trace row or event line (crash mid-write).

    DamagedFile names a file that is there but cannot be read as what it should be; a trace whose times are
    not finite and strictly increasing is one.

    ``trace_columns``: only these columns of the trace are kept (a plot needs five of a dozen)."""
    only = None if trace_columns is None else frozenset(trace_columns)
    folder = Path(folder)
    meta_path = folder / "meta.json"
    meta = _read_json(meta_path) or {}
    summary_path = folder / "summary.json"
    columns = meta.get("trace_columns")
    trace_path, side = folder / "trace.csv", folder / SIDE_FILE
    side_trace = _read_side(side, trace_path, columns, only)
    if side_trace is not None:
        trace, torn = side_trace, False
    else:  # the side file only for a finished run: its trace will not grow again
        trace, torn = _read_trace(trace_path, columns, side=side if summary_path.exists() else None, only=only)
    if "t" in trace:
        _check_time(trace_path, trace["t"])
    events, torn_ev = _read_events(folder / "events.jsonl")
    cycles = _read_cycles(folder / "cycles.csv")
    summary = read_summary(summary_path)
    return StoredRun(folder, meta, trace, events, cycles, summary, torn, torn_ev)


def _check_time(path: Path, t: np.ndarray) -> None:
    """DamagedFile unless the sample times are finite and strictly increasing.

    The recorder writes them so, and every reader relies on it: a trace with rows appended twice, reversed
    or shuffled was read as extra or missing cycles (and a result stated), or failed deep in the settle
    maths with a ValueError.  Rows are numbered as lines of the file (the header is line 1)."""
    if t.size == 0:
        return
    bad = np.flatnonzero(~np.isfinite(t))
    first_bad = int(bad[0]) if bad.size else t.size
    with np.errstate(invalid="ignore"):
        stuck = np.flatnonzero(~(np.diff(t[:first_bad]) > 0))
    if stuck.size:
        i = int(stuck[0]) + 1
        raise DamagedFile(path, f"column 't' does not increase at row {i + 2} ({float(t[i])!r} after "
                                f"{float(t[i - 1])!r}): rows repeated, reordered or edited")
    if bad.size:
        raise DamagedFile(path, f"column 't' is not a finite number at row {first_bad + 2} ({float(t[first_bad])!r})")


def catalog_beside(folder: Path) -> Path | None:
    """The catalog of the data folder a run folder lies in (``<data>/runs/<run>``), where there is one."""
    path = folder.parent.parent / "catalog.sqlite" if folder.parent.name == "runs" else None
    return path if path is not None and path.exists() else None


def read_summary(path: Path) -> dict | None:
    """A run's summary.json: None when absent, DamagedFile when it is not JSON or not shaped as a summary."""
    summary = _read_json(path)
    if summary is not None:
        bad = _summary_shape(summary)
        if bad is not None:
            raise DamagedFile(path, bad)
    return summary


#: results keys that hold a figure (number or null): their names end so
_FIGURES = ("_cm3", "_pa", "_s", "_k", "_m3", "_g", "_pa_s", "rsd", "porosity")


def _summary_shape(doc: dict) -> str | None:
    """What is wrong with a summary that parses but is not shaped as one, or None.  Found by a sweep: a
    summary.json of {"results": 5} (or cycles: 5, or a volume that is text) sent the report and the run's
    API answer into a 500 instead of naming the damaged file."""
    results = doc.get("results", {})
    if not isinstance(results, dict):
        return f"its 'results' is not a JSON object (a {type(results).__name__})"
    cycles = results.get("cycles", [])
    if not isinstance(cycles, list) or not all(isinstance(c, dict) for c in cycles):
        return "its 'results.cycles' is not a list of JSON objects"
    for key, value in results.items():
        if key.endswith(_FIGURES) and value is not None and (isinstance(value, bool)
                                                            or not isinstance(value, int | float)):
            return f"its 'results.{key}' is not a number ({type(value).__name__})"
    return _calibration_shape(doc.get("calibration"))


def _calibration_shape(cal: object) -> str | None:
    """What is wrong with a summary's chamber volumes (found by a sweep: a negative variance made the
    report fail on a complex square root, a volume given as text on a multiplication)."""
    if cal is None or cal == {}:
        return None
    if not isinstance(cal, dict):
        return f"its 'calibration' is not a JSON object (a {type(cal).__name__})"
    for key in ("vc", "vr"):
        if key in cal and not (is_number(cal[key]) and cal[key] > 0):
            return f"its 'calibration.{key}' is not a positive volume ({cal[key]!r})"
    cov = cal.get("cov")
    why = covariance_problem(cov) if cov is not None else None
    return f"its 'calibration.cov' {why}" if why is not None else None
