"""One program per device where the operating system gives no lock: a claim file per resource.

A serial port is opened exclusively (pyserial's flock on the device), but a VISA resource or a Modbus
gateway on the network can be opened by any number of programs, and two runs on two data folders would
then drive or read one instrument at once (found by a sweep).  Every pycnoctl process that opens such a
resource first takes an advisory lock (flock) on a file named after it in the user's runtime folder;
the lock goes with the process, so a killed run leaves nothing to clean up.  It keeps pycnoctl processes
of one user apart; it cannot stop another program from opening the resource.
"""

from __future__ import annotations

import fcntl
import hashlib
import os
import re
import tempfile
from pathlib import Path

from pycnoctl.controller.domain.devices import DeviceDisconnected

#: the folder for claim files: $PYCNOCTL_CLAIMS, else the user's runtime folder, else a per-user temp folder
ENV = "PYCNOCTL_CLAIMS"


def claims_dir() -> Path:
    given = os.environ.get(ENV)
    if given:
        return Path(given)
    runtime = os.environ.get("XDG_RUNTIME_DIR")
    if runtime and Path(runtime).is_dir():
        return Path(runtime) / "pycnoctl-claims"
    return Path(tempfile.gettempdir()) / f"pycnoctl-claims-{os.getuid()}"


def _file_name(key: str) -> str:
    readable = re.sub(r"[^A-Za-z0-9.-]+", "_", key)[:60]
    return f"{readable}-{hashlib.sha256(key.encode()).hexdigest()[:12]}.lock"


class ResourceClaim:
    """Held from ``take()`` to ``release()``: a second claim on the same key, from this process or
    another, is refused with DeviceDisconnected naming the resource."""

    def __init__(self, kind: str, resource: str, name: str) -> None:
        self.key = f"{kind}:{resource.strip().lower()}"  # VISA resource names are case-insensitive
        self.resource = resource
        self.name = name
        self._fd: int | None = None

    def take(self) -> None:
        if self._fd is not None:
            return
        folder = claims_dir()
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        path = folder / _file_name(self.key)
        fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            raise DeviceDisconnected(self.name, f"cannot open {self.resource}: it is in use by another pycnoctl "
                                                "run or daemon") from None
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()} {self.key}\n".encode())
        self._fd = fd

    def release(self) -> None:
        fd, self._fd = self._fd, None
        if fd is not None:
            os.close(fd)  # the lock goes with the descriptor; the file stays (removing it would race)

    @property
    def held(self) -> bool:
        return self._fd is not None
