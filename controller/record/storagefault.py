"""Telling a storage fault (disk full, I/O error, read-only media) from a bug, and saying it in one line.

A full disk or a failing card is a condition of the machine, not of the software: the run stops in
the safe state and the operator is told what could not be saved and why.  Both layers that write
raise their own kind of error (``OSError`` from files, ``sqlite3.Error`` from the catalog), so one
place maps both to a short cause.
"""

from __future__ import annotations

import errno
import sqlite3

#: exit code of a command stopped by a storage fault before or outside a run (see cli/run.py)
EXIT_STORAGE = 6

_ERRNO = {
    errno.ENOSPC: "disk full",
    errno.EDQUOT: "disk quota exceeded",
    errno.EIO: "I/O error",
    errno.EROFS: "read-only media",
    errno.EACCES: "no write permission",
    errno.EPERM: "no write permission",
    errno.EFBIG: "file too large",
}
# SQLite primary result codes (sqlite3.h): SQLITE_READONLY 8, SQLITE_IOERR 10, SQLITE_FULL 13,
# SQLITE_CANTOPEN 14
_SQLITE = {8: "read-only media", 10: "I/O error", 13: "disk full", 14: "cannot open the catalog file"}


class StorageFault(Exception):
    """A command could not write its data folder; the message is the one line the user sees."""


def storage_cause(exc: BaseException) -> str | None:
    """'disk full', 'I/O error', 'read-only media'... for a storage failure, None for anything else."""
    seen: set[int] = set()
    e: BaseException | None = exc
    while e is not None and id(e) not in seen:  # a RecordWriteError wraps the OSError that caused it
        seen.add(id(e))
        if isinstance(e, OSError) and e.errno in _ERRNO:
            return _ERRNO[e.errno]
        if isinstance(e, sqlite3.Error):
            code = getattr(e, "sqlite_errorcode", None)
            if isinstance(code, int) and code & 0xFF in _SQLITE:
                return _SQLITE[code & 0xFF]
            text = str(e).lower()
            for words, cause in (("disk is full", "disk full"), ("disk i/o", "I/O error"),
                                 ("readonly", "read-only media"), ("read-only", "read-only media")):
                if words in text:
                    return cause
        e = e.__cause__ or e.__context__
    return None
