"""SQLite catalog of runs, cycles, calibrations and the run queue.

Durability: WAL journal with synchronous=FULL, so a transaction that returned from commit
survives a process kill and a power loss.  Every write is one short ``BEGIN IMMEDIATE ...
COMMIT`` transaction; Ctrl-C (SIGINT) arriving during one is held back and delivered right
after the commit, so it never tears a write.  The signal handler swap happens only in the main
thread (Python allows signal.signal nowhere else); other threads rely on the lock alone.

Thread safety: one Catalog object holds one connection guarded by a re-entrant lock; any
thread may call any method.  Several processes may open the same file (SQLite's own locking;
busy_timeout 5 s).

The catalog never stores paths: a run's folder is a plain name under the daemon's data root,
and run IDs are only those this module issued (``is_run_id`` checks the form strictly).
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import json
import os
import re
import secrets
import signal
import sqlite3
import threading
import urllib.parse
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

SCHEMA_VERSION = 2  # 2: calibrations bound to an instrument; retire and choose them
#: A sample prefix matching at least this many runs is paged on the creation-time index (see
#: Catalog.list_runs): below it, sorting the matches costs less than walking past the others.
BROAD_PREFIX = 1000
STATUSES = ("queued", "running", "completed", "fault", "aborted", "interrupted", "cancelled")
TERMINAL = frozenset({"completed", "fault", "aborted", "interrupted", "cancelled"})
_ALLOWED = {
    # cancelled: taken off the queue before it started (nothing ran, no record exists)
    "queued": {"running", "aborted", "fault", "interrupted", "cancelled"},
    "running": TERMINAL,
}
_RUN_ID = re.compile(r"^R(\d{8})T(\d{6})Z-([0-9a-f]{6})$")
_CAL_ID = re.compile(r"^C(\d{8})T(\d{6})Z-([0-9a-f]{6})$")
_FOLDER = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,79}$")

_RUNS_TABLE = """CREATE TABLE IF NOT EXISTS runs (
    id TEXT PRIMARY KEY,
    created TEXT NOT NULL,
    sample_id TEXT,
    sequence_name TEXT,
    kind TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('queued','running','completed','fault','aborted','interrupted',
                                           'cancelled')),
    started TEXT,
    ended TEXT,
    folder TEXT,
    volume_m3 REAL,
    u_volume_m3 REAL,
    density REAL,
    mass REAL,
    message TEXT,
    calibration_id TEXT REFERENCES calibrations (id)
);"""
_SCHEMA = """
CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL);
CREATE TABLE IF NOT EXISTS calibrations (
    id TEXT PRIMARY KEY,
    created TEXT NOT NULL,
    expansion_volume TEXT NOT NULL,
    gas TEXT NOT NULL,
    fill_pressure REAL,
    temperature REAL,
    operator TEXT,
    vc REAL NOT NULL,
    vr REAL NOT NULL,
    cov TEXT,
    spheres TEXT,
    residuals TEXT,
    payload TEXT,
    instrument TEXT,
    fingerprint TEXT,
    source TEXT,
    retired TEXT
);
CREATE INDEX IF NOT EXISTS calibrations_by_volume ON calibrations (expansion_volume, gas, created);
CREATE TABLE IF NOT EXISTS calibration_choice (
    instrument TEXT NOT NULL,
    expansion_volume TEXT NOT NULL,
    gas TEXT NOT NULL,
    calibration_id TEXT NOT NULL REFERENCES calibrations (id),
    chosen TEXT NOT NULL,
    PRIMARY KEY (instrument, expansion_volume, gas)
);
""" + _RUNS_TABLE + """
CREATE INDEX IF NOT EXISTS runs_by_created ON runs (created);
CREATE INDEX IF NOT EXISTS runs_by_sample ON runs (sample_id, created);
CREATE INDEX IF NOT EXISTS runs_by_status ON runs (status);
CREATE INDEX IF NOT EXISTS runs_by_status_created ON runs (status, created);
CREATE INDEX IF NOT EXISTS runs_by_sample_order ON runs (sample_id, created, id);
CREATE TABLE IF NOT EXISTS cycles (
    run_id TEXT NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    idx INTEGER NOT NULL,
    p1 REAL,
    p2 REAL,
    volume REAL,
    kept INTEGER NOT NULL,
    PRIMARY KEY (run_id, idx)
);
CREATE TABLE IF NOT EXISTS queue (
    position INTEGER PRIMARY KEY AUTOINCREMENT,
    run_id TEXT NOT NULL UNIQUE REFERENCES runs (id),
    request TEXT NOT NULL
);
"""


def _migrate(con: sqlite3.Connection, version: int) -> None:
    """Bring an older catalog up to SCHEMA_VERSION inside the opening transaction (all or nothing).

    1 -> 2: calibrations gain the instrument they were made on, its configuration fingerprint, their
    source (measured or imported) and a retirement stamp.  Calibrations made before keep NULL there:
    they are never applied automatically, since nothing says which instrument made them."""
    if version < 2:
        have = {r[1] for r in con.execute("PRAGMA table_info(calibrations)")}
        for col in ("instrument", "fingerprint", "source", "retired"):
            if col not in have:
                con.execute(f"ALTER TABLE calibrations ADD COLUMN {col} TEXT")
        # runs gain the status 'cancelled': SQLite cannot alter a CHECK, so the table is rebuilt
        # (foreign keys are off while the catalog opens) and its indexes made again
        sql = con.execute("SELECT sql FROM sqlite_master WHERE type = 'table' AND name = 'runs'").fetchone()
        if sql is not None and "'cancelled'" not in sql[0]:
            cols = ", ".join(r[1] for r in con.execute("PRAGMA table_info(runs)"))
            con.execute(_RUNS_TABLE.replace("CREATE TABLE IF NOT EXISTS runs (", "CREATE TABLE runs__new ("))
            con.execute(f"INSERT INTO runs__new ({cols}) SELECT {cols} FROM runs")
            con.execute("DROP TABLE runs")
            con.execute("ALTER TABLE runs__new RENAME TO runs")
            for stmt in _SCHEMA.split(";"):
                if "CREATE INDEX" in stmt and " ON runs " in stmt:
                    con.execute(stmt)
            bad = con.execute("PRAGMA foreign_key_check").fetchall()
            if bad:
                raise CatalogError(f"catalog migration: {len(bad)} rows break a foreign key")
    con.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION,))


class CatalogError(Exception):
    """A request the catalog refuses (unknown run, bad status change, foreign ID)."""


def _last_written(runs_dir: Path | None, run_id: str) -> str | None:
    """When a run folder's trace (or, before any row, the folder) was last written, as a catalog time."""
    if runs_dir is None:
        return None
    for path in (runs_dir / run_id / "trace.csv", runs_dir / run_id):
        try:
            return _utc(_dt.datetime.fromtimestamp(path.stat().st_mtime, _dt.UTC))
        except (OSError, ValueError, OverflowError):
            continue
    return None


def _utc(dt: _dt.datetime | None = None) -> str:
    dt = dt or _dt.datetime.now(_dt.UTC)
    if dt.tzinfo is None:
        raise ValueError("naive datetime: give a timezone-aware time")
    return dt.astimezone(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _time_arg(x: _dt.datetime | str | None) -> str | None:
    if x is None or isinstance(x, str):
        return x
    return _utc(x)


def prefix_bound(prefix: str) -> str | None:
    """The least string above every string that starts with ``prefix`` (None: no such bound).

    ``prefix <= s < prefix_bound(prefix)`` holds exactly when ``s.startswith(prefix)``: SQLite's
    BINARY collation compares UTF-8 bytes, whose order is the code-point order Python compares by,
    so the range runs on the (sample_id, created) index where LIKE (case-folding, '%' and '_'
    wildcards) and GLOB ('*', '?', '[') would need escaping and could not always use it.
    """
    chars = list(prefix)
    while chars:
        code = ord(chars.pop()) + 1
        if code == 0xD800:  # surrogates cannot be stored (not encodable in UTF-8): skip over them
            code = 0xE000
        if code <= 0x10FFFF:
            return "".join(chars) + chr(code)
    return None


def _issue(prefix: str) -> str:
    now = _dt.datetime.now(_dt.UTC)
    return f"{prefix}{now:%Y%m%dT%H%M%S}Z-{secrets.token_hex(3)}"


def _valid_stamp(m: re.Match[str] | None) -> bool:
    if m is None:
        return False
    try:
        _dt.datetime.strptime(m.group(1) + m.group(2), "%Y%m%d%H%M%S")
    except ValueError:
        return False
    return True


def is_run_id(s: object) -> bool:
    """True only for IDs of the form new_run_id issues, e.g. R20250314T101500Z-1a2b3c."""
    return isinstance(s, str) and _valid_stamp(_RUN_ID.fullmatch(s))


def is_calibration_id(s: object) -> bool:
    return isinstance(s, str) and _valid_stamp(_CAL_ID.fullmatch(s))


@dataclass(frozen=True)
class RunRow:
    id: str
    created: str
    sample_id: str | None
    sequence_name: str | None
    kind: str
    status: str
    started: str | None
    ended: str | None
    folder: str | None
    volume_m3: float | None
    u_volume_m3: float | None  # expanded uncertainty
    density: float | None
    mass: float | None
    message: str | None
    calibration_id: str | None


# the runs columns in RunRow's field order, so that a row becomes a RunRow by position (no dict per row)
_RUN_COLUMNS = ", ".join(f.name for f in dataclasses.fields(RunRow))


@dataclass(frozen=True)
class CycleRow:
    run_id: str
    idx: int
    p1: float | None
    p2: float | None
    volume: float | None
    kept: bool


@dataclass(frozen=True)
class CalibrationRecord:
    """Chamber volumes from one calibration; id and created are filled in by put_calibration."""

    expansion_volume: str
    gas: str
    vc: float
    vr: float
    fill_pressure: float | None = None
    temperature: float | None = None
    operator: str | None = None
    cov: Any = None
    spheres: Any = None
    residuals: Any = None
    payload: Any = None
    id: str | None = None
    created: str | None = None
    instrument: str | None = None  # the identity of the instrument it was made on (None: not known)
    fingerprint: str | None = None  # that instrument's configuration (chambers, roles, transducer) then
    source: str | None = None  # "spheres" (measured here) or "imported" (volumes determined elsewhere)
    retired: str | None = None  # when and why it was taken out of use ("2026-12-04T...Z: reason")


@dataclass(frozen=True)
class QueueEntry:
    position: int
    run_id: str
    request: dict


class _DeferSigint:
    """Hold SIGINT during a commit (main thread only) and deliver it afterwards."""

    def __init__(self) -> None:
        self.pending: tuple[int, Any] | None = None
        self.old: Any = None
        self.active = False

    def __enter__(self) -> _DeferSigint:
        if threading.current_thread() is threading.main_thread():
            try:
                self.old = signal.signal(signal.SIGINT, self._hold)
                self.active = True
            except ValueError:  # not the main interpreter
                self.active = False
        return self

    def _hold(self, signum: int, frame: Any) -> None:
        self.pending = (signum, frame)

    def __exit__(self, *exc: object) -> None:
        if not self.active:
            return
        signal.signal(signal.SIGINT, self.old)
        if self.pending is None:
            return
        signum, frame = self.pending
        if callable(self.old):
            self.old(signum, frame)
        elif self.old == signal.SIG_DFL:
            signal.raise_signal(signal.SIGINT)


def _writable(path: Path) -> bool:
    """Whether the catalog could be written here (access(2) reports EROFS on read-only media, also to root)."""
    folder = path.parent if str(path.parent) else Path(".")
    return os.access(folder, os.W_OK) and (not path.exists() or os.access(path, os.W_OK))


def _refused_write(exc: sqlite3.Error) -> bool:
    """SQLITE_READONLY or SQLITE_CANTOPEN: the media will not take a write (a read may still work)."""
    code = getattr(exc, "sqlite_errorcode", None)
    return (isinstance(code, int) and code & 0xFF in (8, 14)) or "readonly" in str(exc).lower()


def _opening_problem(path: Path, exc: sqlite3.Error) -> CatalogError | None:
    """What a catalog that cannot be opened says: locked, damaged, or the database's own words, with the
    file named (found by a sweep: 'failed: DatabaseError: database disk image is malformed', no path).
    None for anything else: a full disk or an I/O error is the machine's condition, told as a storage fault."""
    code = getattr(exc, "sqlite_errorcode", None)
    primary = code & 0xFF if isinstance(code, int) else None
    text = str(exc)
    if primary == 5 or "locked" in text:  # SQLITE_BUSY
        return CatalogError(f"the catalog {path} is locked by another process (a write held for over 5 s); try "
                            "again, and if it stays locked look for a program holding it open")
    if primary in (11, 26) or "malformed" in text or "not a database" in text:  # SQLITE_CORRUPT, SQLITE_NOTADB
        return CatalogError(f"the catalog {path} is damaged ({text}); every run's record is still in its folder "
                            f"under {path.parent / 'runs'}: move the damaged catalog aside to start a new one")
    return None


def _connect_readonly(path: Path) -> sqlite3.Connection:
    """A connection that never writes.  ``mode=ro`` reads a WAL catalog when its -shm file exists or
    can be made; on media where neither holds, ``immutable=1`` (nothing can change it there anyway)."""
    if not path.exists():
        raise CatalogError(f"no catalog at {path}")
    base = "file:" + urllib.parse.quote(str(path.resolve())) + "?mode=ro"
    last: sqlite3.Error | None = None
    for uri in (base, base + "&immutable=1"):
        con = sqlite3.connect(uri, uri=True, isolation_level=None, check_same_thread=False, timeout=5.0)
        try:
            con.execute("PRAGMA query_only=ON")
            con.execute("SELECT count(*) FROM sqlite_master").fetchone()
            return con
        except sqlite3.Error as exc:
            con.close()
            last = exc
    assert last is not None
    raise last


class Catalog:
    """The runs database. Open once per process; methods are safe to call from any thread."""

    def __init__(self, path: Path | str, *, readonly: bool = False) -> None:
        self.path = Path(path)
        self.readonly = readonly
        self._lock = threading.RLock()
        self._before_commit: Callable[[], None] | None = None  # test hook: runs inside the held section
        try:
            self._open(readonly)
        except sqlite3.Error as exc:
            problem = None if not readonly and _refused_write(exc) else _opening_problem(self.path, exc)
            if problem is None:  # for_reading opens read-only where the media refuses a write
                raise
            raise problem from None

    def _open(self, readonly: bool) -> None:
        if readonly:
            self._con = _connect_readonly(self.path)
            self._con.row_factory = sqlite3.Row
            return
        self._con = sqlite3.connect(
            str(self.path), isolation_level=None, check_same_thread=False, timeout=5.0
        )
        self._con.row_factory = sqlite3.Row
        mode = self._con.execute("PRAGMA journal_mode=WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            raise CatalogError(f"{self.path}: WAL journal mode refused (got {mode!r})")
        self._con.execute("PRAGMA synchronous=FULL")
        self._con.execute("PRAGMA busy_timeout=5000")  # foreign keys go on below, once a migration is done
        with self._write() as con:
            for stmt in _SCHEMA.split(";"):
                if stmt.strip():
                    con.execute(stmt)
            row = con.execute("SELECT version FROM schema_version").fetchone()
            if row is None:
                con.execute("INSERT INTO schema_version (version) VALUES (?)", (SCHEMA_VERSION,))
            elif row[0] > SCHEMA_VERSION:
                raise CatalogError(
                    f"{self.path}: schema version {row[0]} is newer than this software ({SCHEMA_VERSION})"
                )
            elif row[0] < SCHEMA_VERSION:
                _migrate(con, int(row[0]))
        self._con.execute("PRAGMA foreign_keys=ON")

    @classmethod
    def for_reading(cls, path: Path | str) -> Catalog:
        """The catalog for a command that only reads (runs, show, report): opened read-only where
        the folder or the file cannot be written (read-only media, a write-protected copy), since a
        read/write open sets the journal mode and the schema and would fail there."""
        path = Path(path)
        if _writable(path):
            try:
                return cls(path)
            except sqlite3.Error as exc:
                if not _refused_write(exc):
                    raise
        return cls(path, readonly=True)

    # ------------------------------------------------------------------ plumbing
    @contextlib.contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        """One short write transaction; SIGINT is deferred until it has committed or rolled back."""
        with self._lock, _DeferSigint():
            con = self._con
            con.execute("BEGIN IMMEDIATE")
            try:
                yield con
                if self._before_commit is not None:
                    self._before_commit()
                con.execute("COMMIT")
            except BaseException:
                with contextlib.suppress(sqlite3.Error):
                    con.execute("ROLLBACK")
                raise

    def _read(self, sql: str, args: Iterable[Any] = ()) -> list[sqlite3.Row]:
        with self._lock:
            return self._con.execute(sql, tuple(args)).fetchall()

    def close(self) -> None:
        with self._lock:
            self._con.close()

    def __enter__(self) -> Catalog:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def integrity_check(self) -> str:
        return str(self._read("PRAGMA integrity_check")[0][0])

    def schema_version(self) -> int:
        return int(self._read("SELECT version FROM schema_version")[0][0])

    # ------------------------------------------------------------------ runs
    def new_run_id(self) -> str:
        """Issue a fresh run ID not yet in the catalog."""
        while True:
            rid = _issue("R")
            if not self._read("SELECT 1 FROM runs WHERE id = ?", (rid,)):
                return rid

    def create_run(
        self,
        *,
        kind: str,
        sample_id: str | None = None,
        sequence_name: str | None = None,
        status: str = "queued",
        run_id: str | None = None,
        folder: str | None = None,
        calibration_id: str | None = None,
        message: str | None = None,
    ) -> str:
        """Insert a run row (queued or running) and return its ID; issues one unless given."""
        if status not in ("queued", "running"):
            raise CatalogError(f"a new run starts queued or running, not {status!r}")
        if not kind:
            raise CatalogError("run kind is required")
        rid = run_id if run_id is not None else self.new_run_id()
        if not is_run_id(rid):
            raise CatalogError(f"{rid!r} is not a run ID issued by this catalog")
        folder = rid if folder is None else folder
        if not _FOLDER.fullmatch(folder) or ".." in folder:
            raise CatalogError(f"folder {folder!r} must be a plain relative name")
        now = _utc()
        with self._write() as con:
            con.execute(
                "INSERT INTO runs (id, created, sample_id, sequence_name, kind, status, started, folder,"
                " calibration_id, message) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (rid, now, sample_id, sequence_name, kind, status, now if status == "running" else None,
                 folder, calibration_id, message),
            )
        return rid

    def _check_transition(self, con: sqlite3.Connection, run_id: str, status: str) -> str:
        if status not in STATUSES:
            raise CatalogError(f"unknown status {status!r}")
        row = con.execute("SELECT status FROM runs WHERE id = ?", (run_id,)).fetchone()
        if row is None:
            raise CatalogError(f"no run {run_id!r}")
        old = row[0]
        if old != status and status not in _ALLOWED.get(old, set()):
            raise CatalogError(f"run {run_id}: status {old!r} cannot become {status!r}")
        return old

    def update_status(self, run_id: str, status: str, message: str | None = None) -> None:
        """Move a run along queued -> running -> completed/fault/aborted/interrupted."""
        now = _utc()
        with self._write() as con:
            self._check_transition(con, run_id, status)
            con.execute(
                "UPDATE runs SET status = ?, message = COALESCE(?, message),"
                " started = CASE WHEN ? = 'running' AND started IS NULL THEN ? ELSE started END,"
                " ended = CASE WHEN ? IN ('completed','fault','aborted','interrupted') AND ended IS NULL"
                " THEN ? ELSE ended END WHERE id = ?",
                (status, message, status, now, status, now, run_id),
            )

    def finish_run(
        self,
        run_id: str,
        status: str,
        *,
        volume_m3: float | None = None,
        u_volume_m3: float | None = None,
        density: float | None = None,
        mass: float | None = None,
        message: str | None = None,
        calibration_id: str | None = None,
    ) -> None:
        """Record the end of a run and its results in one transaction."""
        if status not in TERMINAL:
            raise CatalogError(f"finish_run needs a terminal status, not {status!r}")
        now = _utc()
        with self._write() as con:
            self._check_transition(con, run_id, status)
            con.execute(
                "UPDATE runs SET status = ?, ended = COALESCE(ended, ?), volume_m3 = ?, u_volume_m3 = ?,"
                " density = ?, mass = ?, message = COALESCE(?, message),"
                " calibration_id = COALESCE(?, calibration_id) WHERE id = ?",
                (status, now, volume_m3, u_volume_m3, density, mass, message, calibration_id, run_id),
            )

    _CYCLE_UPSERT = (
        "INSERT INTO cycles (run_id, idx, p1, p2, volume, kept) VALUES (?, ?, ?, ?, ?, ?)"
        " ON CONFLICT (run_id, idx) DO UPDATE SET p1 = excluded.p1, p2 = excluded.p2,"
        " volume = excluded.volume, kept = excluded.kept"
    )

    def add_cycle(
        self, run_id: str, idx: int, p1: float | None, p2: float | None, volume: float | None, kept: bool
    ) -> None:
        """Insert or replace one cycle's result (kept may be revised after outlier checks)."""
        self.add_cycles(run_id, [(idx, p1, p2, volume, kept)])

    def add_cycles(
        self, run_id: str, rows: Iterable[tuple[int, float | None, float | None, float | None, bool]]
    ) -> None:
        """Insert or replace several cycles in one transaction (one synchronous commit, not one each)."""
        with self._write() as con:
            con.executemany(self._CYCLE_UPSERT, [(run_id, int(i), p1, p2, v, 1 if kept else 0)
                                                 for i, p1, p2, v, kept in rows])

    def get_cycles(self, run_id: str) -> list[CycleRow]:
        rows = self._read("SELECT * FROM cycles WHERE run_id = ? ORDER BY idx", (run_id,))
        return [CycleRow(r["run_id"], r["idx"], r["p1"], r["p2"], r["volume"], bool(r["kept"])) for r in rows]

    def get_run(self, run_id: str) -> RunRow | None:
        if not is_run_id(run_id):
            return None
        rows = self._read("SELECT * FROM runs WHERE id = ?", (run_id,))
        return RunRow(**dict(rows[0])) if rows else None

    def list_runs(
        self,
        sample: str | None = None,
        status: str | Iterable[str] | None = None,
        since: _dt.datetime | str | None = None,
        until: _dt.datetime | str | None = None,
        limit: int | None = 100,
        *,
        sample_prefix: str | None = None,
        kind: str | None = None,
        before: str | None = None,
    ) -> list[RunRow]:
        """Runs newest first; since/until compare the creation time (UTC, inclusive/exclusive).

        ``sample_prefix``: sample IDs starting with it (case-sensitive, no wildcards), as an index
        range.  ``before``: a run ID; only runs after it in this order (the next page, found through
        the index whatever the page number).  ``limit`` None: all matching runs.
        """
        where, args = [], []
        # with a sample condition, the sample index leads: '+' keeps SQLite from picking the status
        # index instead (without statistics it guesses an equality narrower than any range)
        plus = "+" if sample is not None or sample_prefix else ""
        if sample is not None:
            where.append("sample_id = ?")
            args.append(sample)
        if sample_prefix:  # '' matches every run, as str.startswith does
            where.append("sample_id >= ?")
            args.append(sample_prefix)
            bound = prefix_bound(sample_prefix)
            if bound is not None:
                where.append("sample_id < ?")
                args.append(bound)
        if status is not None:
            sts = [status] if isinstance(status, str) else list(status)
            bad = [s for s in sts if s not in STATUSES]
            if bad:
                raise CatalogError(f"unknown status {bad[0]!r}")
            where.append(f"{plus}status IN ({','.join('?' * len(sts))})")
            args.extend(sts)
        if kind is not None:
            where.append(f"{plus}kind = ?")
            args.append(kind)
        if since is not None:
            where.append("created >= ?")
            args.append(_time_arg(since))
        if until is not None:
            where.append("created < ?")
            args.append(_time_arg(until))
        if before is not None:
            if not self._read("SELECT 1 FROM runs WHERE id = ?", (before,)):
                raise CatalogError(f"no run {before!r} to page from")
            where.append("(created, id) < (SELECT created, id FROM runs WHERE id = ?)")
            args.append(before)
        sql = f"SELECT {_RUN_COLUMNS} FROM runs"
        if where:
            sql += " WHERE " + " AND ".join(where)
        order = " ORDER BY created DESC, id DESC"
        sql += order
        if limit is not None:
            sql += " LIMIT ?"
            args.append(int(limit))
            if sample_prefix and self._broad(sample_prefix, bound):
                # many runs match: walking the creation-time index newest first meets a page of them
                # after about limit x (runs / matches) rows, where the range below would sort them all
                sql = sql.replace("sample_id >= ?", "+sample_id >= ?").replace("sample_id < ?", "+sample_id < ?")
            elif sample_prefix:
                # the newest page of a prefix range is chosen on the (sample_id, created, id) index
                # alone; only the rows kept are read from the table
                sql = f"SELECT {_RUN_COLUMNS} FROM runs WHERE rowid IN ({sql.replace(_RUN_COLUMNS, 'rowid', 1)}){order}"
        return [RunRow(*r) for r in self._read(sql, args)]

    def _broad(self, prefix: str, bound: str | None) -> bool:
        """Whether at least BROAD_PREFIX runs start with ``prefix`` (counted on the sample index,
        stopping there: the count costs at most that many index entries)."""
        sql = "SELECT count(*) FROM (SELECT 1 FROM runs WHERE sample_id >= ?"
        args: list[Any] = [prefix]
        if bound is not None:
            sql += " AND sample_id < ?"
            args.append(bound)
        args.append(BROAD_PREFIX)
        return bool(self._read(sql + " LIMIT ?)", args)[0][0] >= BROAD_PREFIX)

    def folder_names(self) -> set[str]:
        """The run folder name of every run the catalog lists (to find folders it does not)."""
        return {str(r[0]) for r in self._read("SELECT COALESCE(folder, id) FROM runs")}

    def mark_interrupted_on_startup(self, message: str = "daemon stopped while running; not resumed",
                                    runs_dir: Path | None = None) -> list[str]:
        """Runs left 'running' by a dead daemon become 'interrupted'; nothing is resumed.

        Their end is when their trace was last written (its file's time, under ``runs_dir``), else now.
        Why: the restart may come days later, and 'ended' at the restart misdated the run (a sweep)."""
        now = _utc()
        with self._write() as con:
            ids = [r[0] for r in con.execute("SELECT id FROM runs WHERE status = 'running' ORDER BY created")]
            for rid in ids:
                con.execute("UPDATE runs SET status = 'interrupted', ended = COALESCE(ended, ?), message = ?"
                            " WHERE id = ? AND status = 'running'", (_last_written(runs_dir, rid) or now, message, rid))
        return ids

    # ------------------------------------------------------------------ calibrations
    def put_calibration(self, cal: CalibrationRecord) -> str:
        cid = cal.id or _issue("C")
        if not is_calibration_id(cid):
            raise CatalogError(f"{cid!r} is not a calibration ID")
        created = cal.created or _utc()

        def js(x: Any) -> str | None:
            return None if x is None else json.dumps(x, allow_nan=False)

        with self._write() as con:
            con.execute(
                "INSERT INTO calibrations (id, created, expansion_volume, gas, fill_pressure, temperature,"
                " operator, vc, vr, cov, spheres, residuals, payload, instrument, fingerprint, source, retired)"
                " VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                (cid, created, cal.expansion_volume, cal.gas, cal.fill_pressure, cal.temperature,
                 cal.operator, float(cal.vc), float(cal.vr), js(cal.cov), js(cal.spheres),
                 js(cal.residuals), js(cal.payload), cal.instrument, cal.fingerprint, cal.source, cal.retired),
            )
        return cid

    @staticmethod
    def _cal(row: sqlite3.Row) -> CalibrationRecord:
        d = dict(row)
        for k in ("cov", "spheres", "residuals", "payload"):
            d[k] = None if d[k] is None else json.loads(d[k])
        return CalibrationRecord(**d)

    def get_calibration(self, cal_id: str) -> CalibrationRecord | None:
        rows = self._read("SELECT * FROM calibrations WHERE id = ?", (cal_id,))
        return self._cal(rows[0]) if rows else None

    def latest_calibration(self, expansion_volume: str, gas: str, instrument: str | None = None
                           ) -> CalibrationRecord | None:
        """The newest calibration in use (not retired) of the volume and gas; with ``instrument``, of
        that instrument only, the operator's choice (calibration_choice) before the newest."""
        if instrument is None:
            rows = self._read(
                "SELECT * FROM calibrations WHERE expansion_volume = ? AND gas = ? AND retired IS NULL"
                " ORDER BY created DESC, id DESC LIMIT 1",
                (expansion_volume, gas),
            )
            return self._cal(rows[0]) if rows else None
        chosen = self.chosen_calibration(instrument, expansion_volume, gas)
        if chosen is not None and chosen.retired is None:
            return chosen
        rows = self._read(
            "SELECT * FROM calibrations WHERE expansion_volume = ? AND gas = ? AND instrument = ?"
            " AND retired IS NULL ORDER BY created DESC, id DESC LIMIT 1",
            (expansion_volume, gas, instrument),
        )
        return self._cal(rows[0]) if rows else None

    def list_calibrations(self, *, instrument: str | None = None, expansion_volume: str | None = None,
                          gas: str | None = None, include_retired: bool = False) -> list[CalibrationRecord]:
        """Calibrations, newest first, filtered by whatever is given."""
        where, args = [], []
        for col, val in (("instrument", instrument), ("expansion_volume", expansion_volume), ("gas", gas)):
            if val is not None:
                where.append(f"{col} = ?")
                args.append(val)
        if not include_retired:
            where.append("retired IS NULL")
        sql = "SELECT * FROM calibrations" + (" WHERE " + " AND ".join(where) if where else "")
        return [self._cal(r) for r in self._read(sql + " ORDER BY created DESC, id DESC", args)]

    def chosen_calibration(self, instrument: str, expansion_volume: str, gas: str) -> CalibrationRecord | None:
        rows = self._read(
            "SELECT c.* FROM calibration_choice AS k JOIN calibrations AS c ON c.id = k.calibration_id"
            " WHERE k.instrument = ? AND k.expansion_volume = ? AND k.gas = ?",
            (instrument, expansion_volume, gas),
        )
        return self._cal(rows[0]) if rows else None

    def choose_calibration(self, cal_id: str, instrument: str, gas: str | None = None) -> None:
        """Use cal_id for its expansion volume on instrument (in its own gas, or in ``gas``) until
        another is chosen; a calibration not bound to an instrument is bound to this one."""
        with self._write() as con:
            row = con.execute("SELECT expansion_volume, gas, instrument, retired FROM calibrations WHERE id = ?",
                              (cal_id,)).fetchone()
            if row is None:
                raise CatalogError(f"no calibration {cal_id}")
            if row["retired"] is not None:
                raise CatalogError(f"calibration {cal_id} is retired ({row['retired']})")
            if row["instrument"] is not None and row["instrument"] != instrument:
                raise CatalogError(f"calibration {cal_id} was made on instrument {row['instrument']!r}, "
                                   f"not {instrument!r}")
            if row["instrument"] is None:
                con.execute("UPDATE calibrations SET instrument = ? WHERE id = ?", (instrument, cal_id))
            con.execute("INSERT OR REPLACE INTO calibration_choice (instrument, expansion_volume, gas,"
                        " calibration_id, chosen) VALUES (?, ?, ?, ?, ?)",
                        (instrument, row["expansion_volume"], gas or row["gas"], cal_id, _utc()))

    def retire_calibration(self, cal_id: str, reason: str) -> None:
        """Take a calibration out of use for good (it stays on record; runs that used it keep its id)."""
        with self._write() as con:
            cur = con.execute("UPDATE calibrations SET retired = ? WHERE id = ? AND retired IS NULL",
                              (f"{_utc()}: {reason}", cal_id))
            if cur.rowcount == 0:
                row = con.execute("SELECT retired FROM calibrations WHERE id = ?", (cal_id,)).fetchone()
                raise CatalogError(f"no calibration {cal_id}" if row is None
                                   else f"calibration {cal_id} is already retired ({row['retired']})")
            con.execute("DELETE FROM calibration_choice WHERE calibration_id = ?", (cal_id,))

    # ------------------------------------------------------------------ queue
    def queue_push(self, run_id: str, request: dict) -> int:
        """Append a queued run's request; returns its queue position."""
        text = json.dumps(request, allow_nan=False)
        with self._write() as con:
            cur = con.execute("INSERT INTO queue (run_id, request) VALUES (?, ?)", (run_id, text))
            return int(cur.lastrowid or 0)

    def queue_pop(self) -> QueueEntry | None:
        """Remove and return the head of the queue (one transaction: never handed out twice)."""
        with self._write() as con:
            row = con.execute("SELECT * FROM queue ORDER BY position LIMIT 1").fetchone()
            if row is None:
                return None
            con.execute("DELETE FROM queue WHERE position = ?", (row["position"],))
        return QueueEntry(row["position"], row["run_id"], json.loads(row["request"]))

    def queue_list(self) -> list[QueueEntry]:
        rows = self._read("SELECT * FROM queue ORDER BY position")
        return [QueueEntry(r["position"], r["run_id"], json.loads(r["request"])) for r in rows]

    def queue_remove(self, run_id: str) -> bool:
        with self._write() as con:
            cur = con.execute("DELETE FROM queue WHERE run_id = ?", (run_id,))
            return cur.rowcount > 0
