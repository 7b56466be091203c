"""One writer per data folder: an OS file lock held by the owning process for its lifetime.

Two writers on one folder (a `run` and a `serve`, say) would each take the other's live run for
one a dead process left behind.  The writer holds ``flock`` on ``pycnoctl.lock`` in the folder;
the OS releases it when the process dies, however it dies, so a lock nobody holds is stale by
definition.  The file records who holds it (pid, command, start time) so a refused writer can say
whom it is waiting for, and a clean release empties it, so a non-empty file found unlocked means
the previous owner was killed.  Readers (``runs``, ``show``, ``report``) take no lock.
"""

from __future__ import annotations

import fcntl
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

LOCK_NAME = "pycnoctl.lock"


class DataFolderBusy(Exception):
    """Another live process writes to this data folder."""

    def __init__(self, root: Path, owner: dict[str, Any]) -> None:
        self.owner = owner
        pid = owner.get("pid", "?")
        command = owner.get("command") or "unknown command"
        since = owner.get("started_utc")
        super().__init__(f"data folder {root} is in use by pid {pid} ({command}"
                         + (f", since {since}" if since else "") + "); stop it or choose another --data")


@dataclass
class DataLock:
    """The held lock; ``stale`` is what a killed previous owner left in the file (else None)."""

    root: Path
    handle: IO[str]
    owner: dict[str, Any]
    stale: dict[str, Any] | None = None

    def release(self) -> None:
        """Empty the file (a clean end), then let go.  The file stays: unlinking it would race."""
        if self.handle.closed:
            return
        try:  # on a failing disk the owner text may stay: the next writer then takes it for a stale lock
            self.handle.seek(0)
            self.handle.truncate()
            self.handle.flush()
        except OSError:
            pass
        finally:
            fcntl.flock(self.handle, fcntl.LOCK_UN)
            self.handle.close()

    def __enter__(self) -> DataLock:
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def acquire(root: Path, command: str) -> DataLock:
    """Take the folder's writer lock or raise DataFolderBusy naming the live owner."""
    root.mkdir(parents=True, exist_ok=True)
    handle = open(root / LOCK_NAME, "a+", encoding="utf-8")  # noqa: SIM115 - held for the process lifetime
    try:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        owner = _read(handle)
        handle.close()
        raise DataFolderBusy(root, owner) from None
    except BaseException:
        handle.close()
        raise
    previous = _read(handle)
    owner = {"pid": os.getpid(), "command": command,
             "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
    handle.seek(0)
    handle.truncate()
    handle.write(json.dumps(owner) + "\n")
    handle.flush()
    os.fsync(handle.fileno())
    return DataLock(root, handle, owner, previous or None)


def live_writer(root: Path) -> dict[str, Any] | None:
    """Who writes this data folder now, as its lock file says, if that process is alive; None when none is.

    For readers, which take no lock (and must not: a reader's lock would refuse a writer starting that
    instant): a run the catalog calls 'running' with no live writer was killed, and stays 'running' until the
    next writer marks it interrupted."""
    try:
        with open(root / LOCK_NAME, encoding="utf-8") as handle:
            owner = _read(handle)
    except OSError:
        return None
    pid = owner.get("pid")
    if not isinstance(pid, int) or pid <= 0:
        return None
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return None
    except PermissionError:  # alive, another user's
        pass
    return owner


def _read(handle: IO[str]) -> dict[str, Any]:
    handle.seek(0)
    text = handle.read(4096).strip()
    if not text:
        return {}
    try:
        data = json.loads(text)
    except ValueError:
        return {"command": "unreadable lock file"}
    return data if isinstance(data, dict) else {}
