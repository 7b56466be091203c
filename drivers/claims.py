"""One program per device where the operating system gives no lock: a claim file per resource.

A serial port is opened exclusively (pyserial's flock on the device), but a VISA resource, a Modbus
gateway or a serial bridge on the network can be opened by any number of programs, and two runs on two
data folders would then drive or read one instrument at once (found by a sweep).  Every pycnoctl process
that opens such a resource first takes an advisory lock (flock) on a file named after the resource; the
lock goes with the process, so a killed run leaves nothing to clean up.  It keeps pycnoctl processes
apart; it cannot stop another program from opening the resource.

Where the files live: ``$PYCNOCTL_CLAIMS`` (an absolute folder) if set, else ``/run/lock``, the folder
the system keeps for device locks, shared by every user and by a service with a private /tmp (the
shipped unit may write there), else a folder of the user's own (``$XDG_RUNTIME_DIR`` or the temporary
folder), which keeps apart only that user's processes.  A file is opened without following a link and
never written, and a folder anyone may replace files in (world-writable without the sticky bit) or one
another user owns is refused: a claim there could be broken, or used to clobber a file.

Within one process a resource is claimed once and shared: one instrument config may read two channels of
one meter (the cell pressure and the supply), and the process is one program.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import ipaddress
import os
import re
import socket
import stat
import tempfile
import threading
import urllib.parse
from pathlib import Path

from pycnoctl.controller.domain.devices import DeviceDisconnected

ENV = "PYCNOCTL_CLAIMS"
SYSTEM_LOCKS = Path("/run/lock")

_held: dict[str, tuple[int, int]] = {}  # key -> (descriptor, claims on it in this process)
_lock = threading.Lock()


class ClaimFolderError(OSError):
    """The claims folder cannot be used safely; the message names it and the way out."""


def _host(host: str) -> str:
    """A host as one spelling: case and a trailing dot folded, brackets dropped, 'localhost', 127.0.0.1 and
    ::1 one key, an IP address in its normal form (as the socket calls read '127.1' or '010.0.0.5')."""
    host = host.strip().lower().strip("[]").rstrip(".")
    if host in ("localhost", "localhost.localdomain"):
        return "loopback"
    try:
        ip = ipaddress.ip_address(host)
    except ValueError:
        try:  # the old dotted forms ('127.1', '010.000.000.005') the socket calls still take
            ip = ipaddress.ip_address(socket.inet_ntoa(socket.inet_aton(host)))
        except OSError:
            return host
    # 'localhost' reaches 127.0.0.1 or ::1; another 127.x address is another listener
    return "loopback" if str(ip) in ("127.0.0.1", "::1") else str(ip)


def _number(text: str) -> str:
    """A USB id as one spelling: '0x1AB1' and '6833' are one vendor."""
    try:
        return str(int(text, 0))
    except ValueError:
        return text.lower()


_VISA_CLASSES = ("INSTR", "SOCKET", "RAW", "INTFC", "BACKPLANE", "SERVANT", "MEMACC")


def claim_key(kind: str, resource: str) -> str:
    """One key for every spelling of one device: VISA names in their canonical form, network URLs by
    scheme, host and port (options dropped), every loopback spelling one, case folded."""
    text = resource.strip()
    if kind == "visa":
        parts = text.split("::")  # the interface and the class in capitals, as the parser wants them
        parts[0] = re.sub(r"^[A-Za-z]+", lambda m: m.group(0).upper(), parts[0])
        if len(parts) > 1 and parts[-1].upper() in _VISA_CLASSES:
            parts[-1] = parts[-1].upper()
        text = "::".join(parts)
        try:
            from pyvisa import rname

            parsed = rname.parse_resource_name(text)
        except Exception:  # not a name pyvisa parses: claimed as written (pyvisa will refuse it anyway)
            return f"visa:{text.lower()}"
        fields = {k: str(getattr(parsed, k)) for k in ("interface_type", "board", "host_address", "lan_device_name",
                                                        "port", "manufacturer_id", "model_code", "serial_number",
                                                        "usb_interface_number", "resource_class")
                  if getattr(parsed, k, None) not in (None, "")}
        if "host_address" in fields:
            fields["host_address"] = _host(fields["host_address"])
        for k in ("manufacturer_id", "model_code"):
            if k in fields:
                fields[k] = _number(fields[k])
        return "visa:" + "::".join(f"{k}={v.lower()}" for k, v in sorted(fields.items()))
    if kind == "serial":
        u = urllib.parse.urlsplit(text)
        try:
            port = u.port
        except ValueError:
            port = None
        return f"serial:{u.scheme.lower()}://{_host(u.hostname or '')}:{port}"
    return f"{kind}:{text.lower()}"


def modbus_tcp_key(host: str, port: int, device_id: int) -> str:
    """A Modbus device behind a gateway: its host, port and device id ('localhost' as 127.0.0.1)."""
    return f"modbus-tcp:{_host(host)}:{port}:{device_id}"


#: the serial URL schemes that reach a device over the network (no device node to flock)
NETWORK_SCHEMES = ("socket", "rfc2217")


def networked(url: str) -> bool:
    return urllib.parse.urlsplit(url.strip()).scheme.lower() in NETWORK_SCHEMES


def _usable(folder: Path, *, own: bool) -> Path:
    """The folder, checked: a directory, not replaceable by others, and (``own``) this user's."""
    try:
        if own or not folder.exists():  # a folder named in PYCNOCTL_CLAIMS that is not there yet: made, as its user's
            folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        st = folder.stat()
    except OSError as exc:
        raise ClaimFolderError(f"the claims folder {folder} cannot be used ({exc.strerror or exc})") from None
    if not stat.S_ISDIR(st.st_mode):
        raise ClaimFolderError(f"the claims folder {folder} is not a folder")
    if st.st_mode & stat.S_IWOTH and not st.st_mode & stat.S_ISVTX:
        raise ClaimFolderError(f"the claims folder {folder} is writable by everyone without the sticky bit: "
                               "anyone could replace a claim there")
    if own and st.st_uid != os.getuid():
        raise ClaimFolderError(f"the claims folder {folder} belongs to another user (uid {st.st_uid})")
    return folder


def claims_dir() -> Path:
    given = os.environ.get(ENV)
    if given:
        if not os.path.isabs(given):
            raise ClaimFolderError(f"{ENV}={given!r} is not an absolute folder (a claim must not depend on "
                                   "the working folder)")
        return _usable(Path(given), own=False)
    if SYSTEM_LOCKS.is_dir() and os.access(SYSTEM_LOCKS, os.W_OK | os.X_OK):
        return _usable(SYSTEM_LOCKS, own=False)
    runtime = os.environ.get("XDG_RUNTIME_DIR")
    if runtime and Path(runtime).is_dir():
        return _usable(Path(runtime) / "pycnoctl-claims", own=True)
    return _usable(Path(tempfile.gettempdir()) / f"pycnoctl-claims-{os.getuid()}", own=True)


def _file_name(key: str) -> str:
    readable = re.sub(r"[^A-Za-z0-9.-]+", "_", key)[:60]
    return f"pycnoctl-{readable}-{hashlib.sha256(key.encode()).hexdigest()[:12]}.lock"


def _open(path: Path) -> int:
    """A read-only descriptor on the claim file, never through a link: an existing file first (another
    user's, in a shared folder, may not be opened with O_CREAT where the kernel protects such files)."""
    flags = os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC | os.O_NONBLOCK
    for _ in range(3):
        try:
            return os.open(path, flags)
        except FileNotFoundError:
            pass
        try:
            return os.open(path, flags | os.O_CREAT | os.O_EXCL, 0o644)
        except FileExistsError:  # made meanwhile by another process: open it
            continue
    return os.open(path, flags)


class ResourceClaim:
    """Held from ``take()`` to ``release()``: a claim on the same device by another process is refused
    with DeviceDisconnected naming the resource; in this process it is shared."""

    def __init__(self, kind: str, resource: str, name: str, *, key: str | None = None) -> None:
        self.key = key if key is not None else claim_key(kind, resource)
        self.resource = resource
        self.name = name
        self._taken = False

    def take(self) -> None:
        if self._taken:
            return
        with _lock:
            fd, count = _held.get(self.key, (-1, 0))
            if count == 0:
                fd = self._acquire()
            _held[self.key] = (fd, count + 1)
        self._taken = True

    def _acquire(self) -> int:
        try:
            path = claims_dir() / _file_name(self.key)
            fd = _open(path)
        except OSError as exc:
            why = str(exc) if isinstance(exc, ClaimFolderError) else \
                f"its claim file cannot be opened ({exc.strerror or exc}; a link there is never followed)"
            raise DeviceDisconnected(self.name, f"cannot open {self.resource}: {why}; set {ENV} to a folder "
                                                "of your own (an absolute path)") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            raise DeviceDisconnected(self.name, f"cannot open {self.resource}: it is in use by another pycnoctl "
                                                "run or daemon") from None
        return fd

    def release(self) -> None:
        if not self._taken:
            return
        self._taken = False
        with _lock:
            fd, count = _held.pop(self.key, (-1, 0))
            if count > 1:
                _held[self.key] = (fd, count - 1)
            elif fd >= 0:
                with contextlib.suppress(OSError):
                    os.close(fd)  # the lock goes with the descriptor; the file stays (removing it would race)

    @property
    def held(self) -> bool:
        return self._taken
