"""Simulated storage faults for the record and catalog writers: a failing write, and a power loss.

Two pieces, wired in by a test or a bench in place of a module's ``open`` and ``os`` (this module
imports nothing of pycnoctl; whoever uses it decides which modules write through it):

* ``IoPlan`` counts every write and fsync made through the layer on the thread that created it and
  fails the N-th with an OSError (ENOSPC by default) -- and, for a disk that stays full, every one
  after it.  Looping N from 1 to the count of one clean run is how SQLite's own tests exercise
  their I/O error paths.  ``sqlite_error`` gives the same fault in the form the catalog sees it.
* ``VolatileDisk`` remembers what an fsync made durable (file contents by inode, directory entries
  by directory) and ``power_cut`` copies the data folder as a power loss at that instant would leave
  it: unsynced data gone (or, with ``keep_unsynced``, torn part-way), a file whose directory was not
  fsynced since it was created gone, a replaced file back to its old contents if the rename was
  not made durable.  Files never written through the layer (the SQLite catalog, which syncs itself)
  are copied as they are.
"""

from __future__ import annotations

import errno as _errno
import io
import os
import shutil
import sqlite3
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

_SQLITE_FORM = {  # how SQLite reports each errno (message, primary result code from sqlite3.h)
    _errno.ENOSPC: ("database or disk is full", 13),
    _errno.EIO: ("disk I/O error", 10),
    _errno.EROFS: ("attempt to write a readonly database", 8),
}


class IoPlan:
    """Fails the ``fail_at``-th counted write (1-based); ``persistent``: and every later one."""

    def __init__(self, fail_at: int | None = None, *, err: int = _errno.ENOSPC, persistent: bool = True) -> None:
        self.fail_at, self.err, self.persistent = fail_at, err, persistent
        self.count = 0
        self.kinds: list[str] = []  # what each counted write was, in order
        self.fired: str | None = None  # the write that failed first
        self.failed = 0  # writes refused (all threads)
        self.on_write: Callable[[int, str], None] | None = None  # called before each counted write
        self._thread = threading.get_ident()
        self._lock = threading.Lock()

    @property
    def down(self) -> bool:
        """The disk is failing now (a persistent fault has fired)."""
        return self.fired is not None and self.persistent

    def hit(self, what: str) -> None:
        """Count one write; raise the planned OSError if this is the one (or the disk stays full)."""
        with self._lock:
            if threading.get_ident() != self._thread:  # a background fsync: not counted, fails when down
                if self.down:
                    self.failed += 1
                    raise OSError(self.err, os.strerror(self.err), what)
                return
            self.count += 1
            self.kinds.append(what)
            n = self.count
        if self.on_write is not None:
            self.on_write(n, what)
        if self.fail_at is not None and (n == self.fail_at or (self.persistent and n > self.fail_at)):
            self.fired = self.fired or what
            self.failed += 1
            raise OSError(self.err, os.strerror(self.err), what)

    def sqlite_error(self) -> sqlite3.OperationalError:
        """The planned fault as the sqlite3 module raises it (message and result code)."""
        message, code = _SQLITE_FORM.get(self.err, ("disk I/O error", 10))
        exc = sqlite3.OperationalError(message)
        exc.sqlite_errorcode = code  # type: ignore[attr-defined]
        return exc


class _Raw(io.RawIOBase):
    """A real file whose writes go through the plan and the disk model."""

    def __init__(self, layer: FaultyFiles, path: str, mode: str) -> None:
        super().__init__()
        self._layer = layer
        self._f = io.FileIO(path, mode)
        self.name = path
        self.mode = mode

    def readable(self) -> bool:
        return self._f.readable()

    def writable(self) -> bool:
        return self._f.writable()

    def seekable(self) -> bool:
        return self._f.seekable()

    def readinto(self, b: Any) -> int | None:
        return self._f.readinto(b)

    def write(self, b: Any) -> int | None:
        self._layer.plan.hit(f"write {os.path.basename(self.name)}")
        return self._f.write(b)

    def seek(self, pos: int, whence: int = 0) -> int:
        return self._f.seek(pos, whence)

    def tell(self) -> int:
        return self._f.tell()

    def truncate(self, size: int | None = None) -> int:
        self._layer.plan.hit(f"truncate {os.path.basename(self.name)}")
        return self._f.truncate(size)

    def fileno(self) -> int:
        return self._f.fileno()

    def close(self) -> None:
        if not self.closed:
            self._f.close()
        super().close()


class FaultyFiles:
    """Replacements for a module's ``open`` and ``os`` that write through an IoPlan (and a disk model)."""

    def __init__(self, plan: IoPlan, disk: VolatileDisk | None = None) -> None:
        self.plan, self.disk = plan, disk
        self.os = _Os(self)

    def open(self, file: Any, mode: str = "r", buffering: int = -1, encoding: str | None = None,
             errors: str | None = None, newline: str | None = None, closefd: bool = True) -> Any:
        if not any(c in mode for c in "wax+"):
            return open(file, mode, buffering, encoding, errors, newline, closefd)
        path = os.fspath(file)
        raw = _Raw(self, path, mode.replace("b", "").replace("t", ""))
        if self.disk is not None:
            self.disk.opened(raw.fileno())
        if buffering == 0:
            return raw
        buffered: Any = io.BufferedRandom(raw) if "+" in mode else io.BufferedWriter(raw)
        if "b" in mode:
            return buffered
        return io.TextIOWrapper(buffered, encoding=encoding or "utf-8", errors=errors, newline=newline,
                                write_through=False)


class _Os:
    """``os`` with fsync and replace counted (and seen by the disk model); the rest passes through."""

    def __init__(self, layer: FaultyFiles) -> None:
        self._layer = layer

    def __getattr__(self, name: str) -> Any:
        return getattr(os, name)

    def fsync(self, fd: int) -> None:
        self._layer.plan.hit("fsync")
        os.fsync(fd)
        if self._layer.disk is not None:
            self._layer.disk.synced(fd)

    def replace(self, src: Any, dst: Any) -> None:
        self._layer.plan.hit(f"rename {os.path.basename(os.fspath(dst))}")
        os.replace(src, dst)


class VolatileDisk:
    """What a power loss would keep of the files under ``root``: only what an fsync made durable."""

    def __init__(self, root: Path) -> None:
        self.root = Path(root).resolve()
        self._lock = threading.Lock()
        self.contents: dict[int, bytes] = {}  # inode -> bytes made durable by its last fsync
        self.entries: dict[str, dict[str, int]] = {}  # directory -> {name: inode} at its last fsync
        self.tracked: set[int] = set()  # inodes written through the layer
        self.before = self._scan()  # what existed (durably) before: {(dir, name): inode}

    def _scan(self) -> set[tuple[str, str, int]]:
        out: set[tuple[str, str, int]] = set()
        if self.root.exists():
            for d, dirs, files in os.walk(self.root):
                for name in dirs + files:
                    out.add((d, name, os.lstat(os.path.join(d, name)).st_ino))
        return out

    def opened(self, fd: int) -> None:
        with self._lock:
            self.tracked.add(os.fstat(fd).st_ino)

    def synced(self, fd: int) -> None:
        st = os.fstat(fd)
        with self._lock:
            if os.path.isdir(f"/proc/self/fd/{fd}"):
                d = os.path.realpath(f"/proc/self/fd/{fd}")
                self.entries[d] = {n: os.lstat(os.path.join(d, n)).st_ino for n in os.listdir(d)}
                return
            self.tracked.add(st.st_ino)
            with open(f"/proc/self/fd/{fd}", "rb") as fh:  # the fd itself may be write-only
                self.contents[st.st_ino] = fh.read()

    def power_cut(self, dest: Path, *, keep_unsynced: float = 0.0) -> Path:
        """Copy the folder to ``dest`` as a power loss now would leave it (see the module doc)."""
        dest = Path(dest)
        with self._lock:
            self._copy(str(self.root), dest, keep_unsynced)
        return dest

    def _durable_entry(self, d: str, name: str, ino: int) -> int | None:
        """The inode the name durably points to, or None if the name would be gone."""
        if (d, name, ino) in self.before:
            return ino
        synced = self.entries.get(d)
        if synced is not None and name in synced:
            return synced[name]
        return None

    def _copy(self, src: str, dest: Path, keep: float) -> None:
        dest.mkdir(parents=True, exist_ok=True)
        for name in sorted(os.listdir(src)):
            path = os.path.join(src, name)
            ino = os.lstat(path).st_ino
            durable = self._durable_entry(src, name, ino)
            if os.path.isdir(path):
                if durable is not None:
                    self._copy(path, dest / name, keep)
                continue
            if ino not in self.tracked and durable in (None, ino):
                shutil.copy2(path, dest / name)  # written by someone else (SQLite syncs itself): as it is
                continue
            if durable is None:
                continue
            data = self.contents.get(durable, b"")
            if durable == ino and keep > 0:
                now = Path(path).read_bytes()
                if now.startswith(data):
                    data = now[: len(data) + int((len(now) - len(data)) * keep)]
            (dest / name).write_bytes(data)


def patch_writers(layer: FaultyFiles, modules: list[Any], catalog_class: Any = None) -> Callable[[], None]:
    """Make ``modules`` write through the layer (their ``open`` and ``os``) and, given the catalog
    class, fail its commits as the plan says; returns the function that undoes it all."""
    import contextlib

    undo: list[Callable[[], None]] = []
    for m in modules:
        had_open = "open" in vars(m)
        old_open, old_os = vars(m).get("open"), m.os
        m.open, m.os = layer.open, layer.os

        def restore(m: Any = m, had_open: bool = had_open, old_open: Any = old_open, old_os: Any = old_os) -> None:
            m.os = old_os
            if had_open:
                m.open = old_open
            else:
                del m.open

        undo.append(restore)
    if catalog_class is not None:
        real = catalog_class._write
        plan = layer.plan

        @contextlib.contextmanager
        def _write(self: Any) -> Any:
            with real(self) as con:
                yield con
                try:  # the commit is the catalog's write: fail it as SQLite would (then it rolls back)
                    plan.hit("catalog commit")
                except OSError:
                    raise plan.sqlite_error() from None

        catalog_class._write = _write
        undo.append(lambda: setattr(catalog_class, "_write", real))

    def undo_all() -> None:
        for u in reversed(undo):
            u()

    return undo_all
