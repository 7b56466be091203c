"""Byte transports under the device drivers: serial (pyserial) and VISA (pyvisa).

A driver only ever sees the small Transport protocol below, so the same relay or gauge driver
runs on a USB serial adapter, a TCP bridge (socket://), pyserial's loop:// or a fake device.
The transport turns every way a link can fail into one of two typed errors: a silent or
partial reply is a DeviceTimeout (pyserial returns b'' or half a line without complaint), a
vanished port is a DeviceDisconnected.  Each exchange is logged at DEBUG, each transport has
one lock so a query is never interleaved with another thread's, and reopen() goes back to the
same path, which should be a stable one (/dev/serial/by-id/...) so a re-plugged adapter that
came back as another ttyUSB number is found again.
"""

from __future__ import annotations

import logging
import threading
import time
from typing import Any, Protocol, runtime_checkable

import serial

try:  # pyserial's flush() on a dead pty/tty raises termios.error, which is not an OSError
    from termios import error as _TermiosError
except ImportError:  # pragma: no cover - not on POSIX
    class _TermiosError(Exception):  # type: ignore[no-redef]
        pass

from pycnoctl.controller.domain.devices import DeviceDisconnected, DeviceError, DeviceTimeout
from pycnoctl.drivers.claims import ResourceClaim, networked

log = logging.getLogger(__name__)


@runtime_checkable
class Transport(Protocol):
    """What a device driver needs from a link."""

    name: str
    lock: threading.RLock

    def write(self, data: bytes) -> None: ...

    def readline(self, timeout: float | None = None) -> bytes:
        """One reply line without its terminator; DeviceTimeout if it does not arrive whole."""

    def read_exact(self, size: int, timeout: float | None = None) -> bytes:
        """Exactly size bytes (binary frames); DeviceTimeout if fewer arrive."""

    def query(self, data: bytes, timeout: float | None = None) -> bytes:
        """Write, then read one reply line, as one locked exchange."""

    def reopen(self) -> None: ...

    def close(self) -> None: ...


class _LineQuery:
    """One command, one reply line, under the transport's lock; logged once either way.

    Late-reply rule.  Line protocols carry no sequence number, so a reply that arrives after its
    query timed out would otherwise be read as the answer to the next query (an old value,
    stamped now).  Two things prevent that: on a serial link the input buffer is flushed before
    every command (a late line already waiting is dropped), and a timed-out query leaves the reply *owed* for
    one more timeout window: the next query first waits out the rest of that window, discarding
    the owed line if it comes, and only then sends.  A reply later than twice the timeout is
    beyond this rule (on a serial link the flush still drops it if it came before the next command);
    the anchored reply patterns of the drivers are the last line of defence against foreign lines.
    """

    name: str
    lock: threading.RLock
    timeout: float
    _owed_until: float | None = None  # monotonic deadline of a timed-out query's late reply

    def query(self, data: bytes, timeout: float | None = None) -> bytes:
        with self.lock:
            self._discard_late(data)
            self._write(data)  # type: ignore[attr-defined]
            try:
                reply = self.readline(timeout, command=data)  # type: ignore[attr-defined]
            except DeviceError as exc:
                if isinstance(exc, DeviceTimeout):
                    window = self.timeout if timeout is None else timeout
                    self._owed_until = time.monotonic() + window
                log.debug("%s: sent %r, got %s", self.name, data, type(exc).__name__)
                raise
            log.debug("%s: sent %r, got %r", self.name, data, reply)
            return reply

    def _discard_late(self, command: bytes) -> None:
        """Wait out what is left of an owed reply's window and drop the line if it comes."""
        until, self._owed_until = self._owed_until, None
        if until is None:
            return
        left = until - time.monotonic()
        if left <= 0:
            return  # the input flush before the command drops it if it has come
        try:
            late = self.readline(left, command=command)  # type: ignore[attr-defined]
        except DeviceTimeout:
            return
        log.debug("%s: dropped late reply %r before sending %r", self.name, late, command)


class SerialTransport(_LineQuery):
    """A pyserial port opened with serial_for_url: a device path, socket://host:port or loop://."""

    def __init__(self, url: str, *, name: str | None = None, baudrate: int = 9600,
                 timeout: float = 0.5, eol: bytes = b"\n", open_now: bool = True,
                 **serial_kwargs: Any) -> None:
        self.url = url
        self.name = name or url
        self.baudrate = baudrate
        self.timeout = timeout
        self.eol = eol
        self._kwargs = serial_kwargs
        self.lock = threading.RLock()
        self._port: serial.SerialBase | None = None
        # a network bridge (socket://, rfc2217://) has no flock: a claim keeps pycnoctl processes apart there
        self._claim = ResourceClaim("serial", url, self.name) if networked(url) else None
        if open_now:
            self.open()

    # -- life cycle -------------------------------------------------------------------------
    def open(self) -> None:
        with self.lock:
            if self._port is not None:
                return
            # exclusive: a second program (another run, a daemon on another data folder) opening the same
            # port is refused; shared, two processes drove one relay board (found by a sweep: both runs
            # faulted 'relays disagree', or, without read-back, one opened the inlet during the other's zero
            # and the other blamed an inlet leak).  An advisory lock (flock) on a device path; socket://
            # and loop:// ignore it (a network bridge takes a claim instead).
            kwargs = {"exclusive": True, **self._kwargs}
            fresh = self._claim is not None and not self._claim.held
            if self._claim is not None:
                self._claim.take()
            try:
                self._port = serial.serial_for_url(
                    self.url, baudrate=self.baudrate, timeout=self.timeout,
                    write_timeout=self.timeout, **kwargs)
            except (serial.SerialException, OSError, ValueError) as exc:
                if fresh and self._claim is not None:  # a first open that failed keeps nothing
                    self._claim.release()
                busy = "exclusively lock" in str(exc)
                why = "it is in use by another program (another pycnoctl run or daemon?)" if busy else str(exc)
                raise DeviceDisconnected(self.name, f"cannot open {self.url}: {why}") from exc
            log.debug("%s: opened %s", self.name, self.url)

    def reopen(self) -> None:
        """Close (ignoring errors: the old port may be dead) and open the same path again."""
        with self.lock:
            self._drop()
            self.open()

    def close(self) -> None:
        with self.lock:
            self._drop()
            if self._claim is not None:
                self._claim.release()

    def _drop(self) -> None:
        port, self._port = self._port, None
        if port is not None:
            try:
                port.close()
            except (serial.SerialException, OSError, _TermiosError) as exc:
                log.debug("%s: close failed: %s", self.name, exc)

    @property
    def is_open(self) -> bool:
        return self._port is not None

    def _live(self, command: bytes | None) -> serial.SerialBase:
        if self._port is None:
            raise DeviceDisconnected(self.name, "port is closed (reconnect needed)", command)
        return self._port

    def _lost(self, exc: BaseException, command: bytes | None, reply: bytes | None = None) -> DeviceError:
        # After an unplug pyserial keeps is_open True; drop the port so nothing uses it again.
        self._drop()
        return DeviceDisconnected(self.name, f"link lost: {exc}", command, reply)

    # -- I/O --------------------------------------------------------------------------------
    def write(self, data: bytes) -> None:
        with self.lock:
            self._write(data)
            log.debug("%s: sent %r", self.name, data)

    def _write(self, data: bytes) -> None:
        with self.lock:
            port = self._live(data)
            try:
                port.reset_input_buffer()  # a late reply to an earlier query must not be read as ours
                port.write(data)
                port.flush()
            except serial.SerialTimeoutException as exc:
                raise DeviceTimeout(self.name, "write timed out", data) from exc
            except (serial.SerialException, OSError, _TermiosError) as exc:
                raise self._lost(exc, data) from exc

    def _with_timeout(self, timeout: float | None, fn: Any) -> bytes:
        port = self._port
        assert port is not None
        if timeout is None or timeout == self.timeout:
            return fn(port)
        old = port.timeout
        port.timeout = timeout
        try:
            return fn(port)
        finally:
            if self._port is port:
                port.timeout = old

    def readline(self, timeout: float | None = None, *, command: bytes | None = None) -> bytes:
        with self.lock:
            self._live(command)
            try:
                raw = self._with_timeout(timeout, lambda p: p.read_until(self.eol))
            except (serial.SerialException, OSError, _TermiosError) as exc:
                raise self._lost(exc, command) from exc
            if not raw.endswith(self.eol):
                what = "no reply" if not raw else "partial reply"
                raise DeviceTimeout(self.name, what, command, raw or None)
            return raw[: -len(self.eol)].rstrip(b"\r")

    def read_exact(self, size: int, timeout: float | None = None, *,
                   command: bytes | None = None) -> bytes:
        with self.lock:
            self._live(command)
            try:
                raw = self._with_timeout(timeout, lambda p: p.read(size))
            except (serial.SerialException, OSError, _TermiosError) as exc:
                raise self._lost(exc, command) from exc
            if len(raw) != size:
                raise DeviceTimeout(self.name, f"{len(raw)} of {size} bytes", command, raw or None)
            return raw



class VisaTransport(_LineQuery):
    """A pyvisa message-based resource (default backend pyvisa-py '@py'; tests use '@sim').

    Replies are read as whole messages, so the VISA read termination does the framing.
    """

    def __init__(self, resource: str, *, name: str | None = None, backend: str = "@py",
                 timeout: float = 1.0, read_termination: str = "\n", write_termination: str = "\n",
                 open_now: bool = True) -> None:
        self.resource = resource
        self.name = name or resource
        self.backend = backend
        self.timeout = timeout
        self.read_termination = read_termination
        self.write_termination = write_termination
        self.lock = threading.RLock()
        self._rm: Any = None
        self._inst: Any = None
        # VISA does not keep a second program off the resource (found by a sweep): a claim does, among
        # pycnoctl processes; held from the first open to close, over reopens
        self._claim = ResourceClaim("visa", resource, self.name)
        if open_now:
            self.open()

    def open(self) -> None:
        import pyvisa

        with self.lock:
            if self._inst is not None:
                return
            fresh = not self._claim.held
            self._claim.take()
            try:
                if self._rm is None:
                    self._rm = pyvisa.ResourceManager(self.backend)
                self._inst = self._rm.open_resource(
                    self.resource, read_termination=self.read_termination,
                    write_termination=self.write_termination, timeout=int(self.timeout * 1000))
            except (pyvisa.Error, OSError, ValueError) as exc:
                if fresh:  # a first open that failed keeps nothing (a reopen keeps the claim it had)
                    self._claim.release()
                raise DeviceDisconnected(self.name, f"cannot open {self.resource}: {exc}") from exc
            log.debug("%s: opened %s (%s)", self.name, self.resource, self.backend)

    def reopen(self) -> None:
        with self.lock:
            self._drop()
            self.open()

    def close(self) -> None:
        with self.lock:
            self._drop()
            self._claim.release()
            rm, self._rm = self._rm, None
            if rm is not None:
                try:
                    rm.close()
                except Exception as exc:  # release must not mask the original problem
                    log.debug("%s: resource manager close failed: %s", self.name, exc)

    def _drop(self) -> None:
        inst, self._inst = self._inst, None
        if inst is not None:
            try:
                inst.close()
            except Exception as exc:  # a dead session may refuse to close
                log.debug("%s: close failed: %s", self.name, exc)

    @property
    def is_open(self) -> bool:
        return self._inst is not None

    def _error(self, exc: BaseException, command: bytes | None) -> DeviceError:
        import pyvisa

        timeout = pyvisa.constants.StatusCode.error_timeout
        if isinstance(exc, pyvisa.VisaIOError) and exc.error_code == timeout:
            return DeviceTimeout(self.name, "no reply", command)
        self._drop()
        return DeviceDisconnected(self.name, f"link lost: {exc}", command)

    def _live(self, command: bytes | None) -> Any:
        if self._inst is None:
            raise DeviceDisconnected(self.name, "session is closed (reconnect needed)", command)
        return self._inst

    def write(self, data: bytes) -> None:
        with self.lock:
            self._write(data)
            log.debug("%s: sent %r", self.name, data)

    def _write(self, data: bytes) -> None:
        with self.lock:
            inst = self._live(data)
            try:
                inst.write(data.decode("ascii").rstrip(self.write_termination or None))
            except Exception as exc:
                raise self._error(exc, data) from exc

    def readline(self, timeout: float | None = None, *, command: bytes | None = None) -> bytes:
        with self.lock:
            inst = self._live(command)
            old = inst.timeout
            try:
                if timeout is not None:
                    inst.timeout = int(timeout * 1000)
                text = inst.read()
            except Exception as exc:
                raise self._error(exc, command) from exc
            finally:
                if timeout is not None and self._inst is inst:
                    inst.timeout = old
            return text.encode("ascii", "replace")

    def read_exact(self, size: int, timeout: float | None = None, *,
                   command: bytes | None = None) -> bytes:
        with self.lock:
            inst = self._live(command)
            try:
                raw = inst.read_bytes(size)
            except Exception as exc:
                raise self._error(exc, command) from exc
            return bytes(raw)

