"""Fake byte-level devices: relay-board and gauge firmware on a pty pair or a loopback TCP socket.

The real serial drivers open these exactly as they would open a USB adapter (pyserial on the
pty's slave path, or socket://127.0.0.1:PORT), so the whole path - templates, framing,
timeouts, typed errors, reconnect - is exercised with no hardware.  The firmware is backed by
any ValveBank / PressureSensor: backed by the simulator's in-process drivers, opening the
inlet relay through the serial driver makes the fake gauge's pressure rise.

Faults: `fault = "silent"` (no reply), `"garbage"` (a junk line), `"drop"` (close the link
when the next request arrives, so pyserial raises SerialException mid-read); `unplug()` /
`replug()` pull and restore the cable, keeping the stable path (a symlink standing in for
/dev/serial/by-id/...) pointing at the new pty.  The gauge follows the backing Reading's
validity: TIMEOUT -> no reply, GARBLED -> junk, NAN -> 'NaN', OUT_OF_RANGE -> 'OVER',
DISCONNECTED -> the link drops.  The wire protocol is drivers/PROTOCOL.md.
"""

from __future__ import annotations

import contextlib
import logging
import os
import select
import socket
import tempfile
import threading
import time
import tty
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Literal, Protocol

from pycnoctl.controller.domain.devices import DeviceTimeout, PressureSensor, Reading, Validity, ValveBank
from pycnoctl.controller.domain.units import convert

log = logging.getLogger(__name__)

DROP = object()  # a handler returns this to make the device cut the link
Reply = bytes | None | object
Fault = Literal["silent", "garbage", "drop"] | None
GARBAGE = b"\x8f#?\x00~\xfe%\n"


class Firmware(Protocol):
    """What runs on the fake device: framing plus one handler per received frame."""

    frame: bytes | int  # a terminator (line protocols) or a fixed frame length (binary)

    def handle(self, request: bytes) -> Reply: ...

    def tick(self) -> None:
        """Called about every 20 ms by the device thread (watchdogs)."""


# -- plain backings (when no simulator is wanted behind a fake device) ------------------------

class MemoryValveBank:
    """A ValveBank that only remembers; `stuck` pins valves so read-back disagrees with commands."""

    def __init__(self, names: tuple[str, ...], initial: Mapping[str, bool] | None = None) -> None:
        self._names = tuple(names)
        self._state = {n: False for n in self._names}
        self._state.update(initial or {})
        self.stuck: dict[str, bool] = {}
        self.history: list[dict[str, bool]] = []

    @property
    def valve_names(self) -> tuple[str, ...]:
        return self._names

    def set_valves(self, states: Mapping[str, bool]) -> None:
        unknown = set(states) - set(self._names)
        if unknown:
            raise KeyError(f"unknown valve(s) {sorted(unknown)}")
        self.history.append(dict(states))
        self._state.update({k: bool(v) for k, v in states.items()})

    def commanded(self) -> dict[str, bool]:
        return dict(self._state)

    def read_back(self) -> dict[str, bool] | None:
        return {**self._state, **self.stuck}

    def close(self) -> None:
        return None


class ScriptedSensor:
    """A PressureSensor returning `value` (Pa), or the validities queued in `script` first."""

    def __init__(self, value: float = 0.0, name: str = "scripted", t: Callable[[], float] = time.monotonic):
        self.name = name
        self.value = value
        self.script: list[Validity] = []
        self._t = t

    def read(self) -> Reading:
        if self.script:
            return Reading.invalid("Pa", self._t(), self.script.pop(0), "scripted")
        return Reading(self.value, "Pa", self._t())

    def close(self) -> None:
        return None


class ScriptedTransport:
    """A Transport replaying an expected dialogue: a list of (sent, reply) byte pairs.

    A reply of None means the device stays silent (DeviceTimeout); a sent frame that differs from
    the next expected one fails with AssertionError naming both, so protocol tests read as a table.
    """

    def __init__(self, dialogue: list[tuple[bytes, bytes | None]], name: str = "scripted") -> None:
        self.dialogue = list(dialogue)
        self.name = name
        self.lock = threading.RLock()
        self.sent: list[bytes] = []
        self.reopened = 0

    def _next(self, data: bytes) -> bytes | None:
        self.sent.append(data)
        if not self.dialogue:
            raise AssertionError(f"{self.name}: unexpected {data!r} after the end of the dialogue")
        want, reply = self.dialogue.pop(0)
        if data != want:
            raise AssertionError(f"{self.name}: sent {data!r}, expected {want!r}")
        return reply

    def write(self, data: bytes) -> None:
        reply = self._next(data)
        if reply:
            raise AssertionError(f"{self.name}: {data!r} was written without reading its reply {reply!r}")

    def query(self, data: bytes, timeout: float | None = None) -> bytes:
        reply = self._next(data)
        if reply is None:
            raise DeviceTimeout(self.name, "no reply", data)
        return reply.rstrip(b"\n").rstrip(b"\r")

    def readline(self, timeout: float | None = None) -> bytes:
        raise DeviceTimeout(self.name, "no reply")

    def read_exact(self, size: int, timeout: float | None = None) -> bytes:
        raise DeviceTimeout(self.name, "no reply")

    def reopen(self) -> None:
        self.reopened += 1

    def close(self) -> None:
        return None

    def done(self) -> bool:
        return not self.dialogue


# -- firmware ---------------------------------------------------------------------------------

class RelayFirmware:
    """The ASCII relay protocol of PROTOCOL.md, driving a backing ValveBank.

    channels: relay number -> (valve name, normally_open).  The relay state is the firmware's
    own; STATE? reports the backing bank's read-back where it has one, so a stuck valve in the
    simulator shows up on the wire.
    """

    frame = b"\n"

    def __init__(self, bank: ValveBank, channels: Mapping[int, tuple[str, bool]], *,
                 ident: str = "relay-fw 1.2 fake", n_relays: int = 8,
                 monotonic: Callable[[], float] = time.monotonic) -> None:
        self.bank = bank
        self.channels = dict(channels)
        self.ident = ident
        self.n_relays = max(n_relays, *self.channels)
        self.energised: set[int] = set()
        self.watchdog = 0.0
        self.watchdog_tripped = False
        self._monotonic = monotonic
        self._last = monotonic()

    @classmethod
    def for_board(cls, bank: ValveBank, channels: Mapping[str, object], **kw: object) -> RelayFirmware:
        """Build from a relay driver's {valve: Channel} map (anything with .channel/.normally_open)."""
        table = {ch.channel: (valve, ch.normally_open) for valve, ch in channels.items()}  # type: ignore[attr-defined]
        return cls(bank, table, **kw)  # type: ignore[arg-type]

    def _apply(self, relay: int, on: bool) -> None:
        if relay in self.channels:
            valve, normally_open = self.channels[relay]
            self.bank.set_valves({valve: on != normally_open})
        (self.energised.add if on else self.energised.discard)(relay)

    def _mask(self) -> int:
        seen = self.bank.read_back()
        states = seen if seen is not None else self.bank.commanded()
        mask = 0
        for relay in range(1, self.n_relays + 1):
            if relay in self.channels:
                valve, normally_open = self.channels[relay]
                on = states.get(valve, normally_open) != normally_open
            else:
                on = relay in self.energised
            mask |= int(on) << (relay - 1)
        return mask

    def handle(self, request: bytes) -> Reply:
        self._last = self._monotonic()
        if len(request.rstrip(b"\r\n")) > 64:
            return b"ERR 1 line too long\n"
        words = request.decode("ascii", "replace").strip().split()
        if not words:
            return b"ERR 1 empty command\n"
        cmd, args = words[0].upper(), words[1:]
        try:
            if cmd == "ID?" and not args:
                return f"ID {self.ident}\n".encode()
            if cmd == "PING" and not args:
                return b"PONG\n"
            if cmd == "STATE?" and not args:
                return f"STATE {self._mask():04X}\n".encode()
            if cmd == "ALLOFF" and not args:
                for relay in range(1, self.n_relays + 1):
                    self._apply(relay, False)
                return b"OK\n"
            if cmd == "WDOG" and len(args) == 1:
                self.watchdog = float(args[0])
                self.watchdog_tripped = False
                return b"OK\n"
            if cmd == "RELAY" and len(args) == 2:
                relay = int(args[0])
                if not 1 <= relay <= self.n_relays:
                    return f"ERR 3 relay {relay} out of range 1..{self.n_relays}\n".encode()
                word = args[1].upper()
                if word not in ("ON", "OFF"):
                    return b"ERR 2 state must be ON or OFF\n"
                self._apply(relay, word == "ON")
                return b"OK\n"
        except ValueError:
            return b"ERR 2 bad argument\n"
        except Exception as exc:  # the backing bank refused: report it as a board fault
            return f"ERR 4 {type(exc).__name__}\n".encode()
        return b"ERR 1 unknown command\n"

    def tick(self) -> None:
        if self.watchdog > 0 and not self.watchdog_tripped and self._monotonic() - self._last > self.watchdog:
            log.warning("fake relay board: watchdog expired, de-energising every relay")
            for relay in range(1, self.n_relays + 1):
                with contextlib.suppress(Exception):
                    self._apply(relay, False)
            self.watchdog_tripped = True


class BinaryRelayFirmware(RelayFirmware):
    """The 4-byte frames of common serial USB relay modules: A0, relay, state (0/1), sum. No reply."""

    frame = 4

    def handle(self, request: bytes) -> Reply:
        self._last = self._monotonic()
        if len(request) != 4 or request[0] != 0xA0 or (sum(request[:3]) & 0xFF) != request[3]:
            log.debug("fake binary relay: bad frame %r ignored", request)
            return None
        relay, state = request[1], request[2]
        if 1 <= relay <= self.n_relays and state in (0, 1):
            with contextlib.suppress(Exception):
                self._apply(relay, bool(state))
        return None


class GaugeFirmware:
    """The ASCII gauge protocol of PROTOCOL.md, reporting a backing PressureSensor."""

    frame = b"\n"

    def __init__(self, sensor: PressureSensor, *, unit: str = "kPa", ident: str = "gauge-fw 0.9 fake",
                 digits: int = 4) -> None:
        self.sensor = sensor
        self.unit = unit
        self.ident = ident
        self.digits = digits

    def handle(self, request: bytes) -> Reply:
        cmd = request.decode("ascii", "replace").strip().upper()
        if cmd == "ID?":
            return f"ID {self.ident}\n".encode()
        if cmd == "PING":
            return b"PONG\n"
        if cmd != "P?":
            return b"ERR 1 unknown command\n"
        r = self.sensor.read()
        if r.validity is Validity.VALID:
            return f"P {convert(r.value, 'pressure', self.unit):.{self.digits}f} {self.unit}\n".encode()
        return {
            Validity.TIMEOUT: None,
            Validity.STALE: None,
            Validity.GARBLED: GARBAGE,
            Validity.NAN: f"P NaN {self.unit}\n".encode(),
            Validity.OUT_OF_RANGE: f"P OVER {self.unit}\n".encode(),
            Validity.OPEN_LOOP: f"P UNDER {self.unit}\n".encode(),
            Validity.FROZEN: None,
            Validity.DISCONNECTED: DROP,
        }[r.validity]

    def tick(self) -> None:
        return None


# -- links ------------------------------------------------------------------------------------

class FakeDevice:
    """A firmware served on a pty pair (default) or a TCP socket on 127.0.0.1, in a thread."""

    def __init__(self, firmware: Firmware, *, link: Literal["pty", "tcp"] = "pty",
                 stable_name: str = "usb-fake-device-if00", reply_delay: float = 0.0) -> None:
        self.firmware = firmware
        self.link = link
        self.reply_delay = reply_delay
        self.fault: Fault = None
        self.received: list[bytes] = []
        self.exchanges: list[tuple[bytes, bytes | None]] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._plugged = True
        self._master: int | None = None
        self._slave: int | None = None
        self._listener: socket.socket | None = None
        self._conn: socket.socket | None = None
        self._dir = tempfile.TemporaryDirectory(prefix="pycno-fakedev-")
        self._stable = Path(self._dir.name) / stable_name
        if link == "pty":
            self._open_pty()
        else:
            self._listener = socket.create_server(("127.0.0.1", 0))
            self._listener.setblocking(False)
        self._thread = threading.Thread(target=self._run, name=f"fakedev-{stable_name}", daemon=True)
        self._thread.start()

    # -- addressing ---------------------------------------------------------------------------
    @property
    def url(self) -> str:
        """What to give pyserial: the stable symlink to the pty, or socket://127.0.0.1:PORT."""
        if self.link == "pty":
            return str(self._stable)
        assert self._listener is not None
        return f"socket://127.0.0.1:{self._listener.getsockname()[1]}"

    def _open_pty(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)
        self._master, self._slave = master, slave
        tmp = self._stable.with_suffix(".new")
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        os.symlink(os.ttyname(slave), tmp)
        os.replace(tmp, self._stable)

    # -- cable --------------------------------------------------------------------------------
    def unplug(self) -> None:
        """Pull the cable: the open port dies (pyserial raises SerialException on its next I/O)."""
        with self._lock:
            self._plugged = False
            self._cut()

    def replug(self) -> None:
        """Plug back in; a pty comes back under a new tty name, reachable by the same stable path."""
        with self._lock:
            if self._plugged:
                return
            if self.link == "pty":
                self._open_pty()
            self._plugged = True

    def _cut(self) -> None:
        for attr in ("_master", "_slave"):
            fd = getattr(self, attr)
            setattr(self, attr, None)
            if fd is not None:
                with contextlib.suppress(OSError):
                    os.close(fd)
        conn, self._conn = self._conn, None
        if conn is not None:
            with contextlib.suppress(OSError):
                conn.shutdown(socket.SHUT_RDWR)
            conn.close()

    # -- the device thread --------------------------------------------------------------------
    def _run(self) -> None:
        buf = b""
        while not self._stop.is_set():
            self.firmware.tick()
            fd = self._readable_fd()
            if fd is None:
                buf = b""
                time.sleep(0.01)
                continue
            try:
                ready, _, _ = select.select([fd], [], [], 0.02)
            except (OSError, ValueError):
                continue
            if not ready:
                continue
            try:
                chunk = self._recv(fd)
            except OSError:
                chunk = b""
            if not chunk:
                if self.link == "tcp":
                    with self._lock:
                        self._conn = None
                buf = b""
                continue
            buf += chunk
            for request in self._frames(buf):
                buf = buf[len(request):]
                self._serve(request)

    def _readable_fd(self) -> int | socket.socket | None:
        with self._lock:
            if not self._plugged:
                if self.link == "tcp":
                    self._refuse()
                return None
            if self.link == "pty":
                return self._master
            if self._conn is None:
                self._accept()
            return self._conn

    def _accept(self) -> None:
        assert self._listener is not None
        try:
            conn, _ = self._listener.accept()
        except (BlockingIOError, OSError):
            return
        conn.setblocking(True)
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)  # replies go out at once
        self._conn = conn

    def _refuse(self) -> None:
        assert self._listener is not None
        try:
            conn, _ = self._listener.accept()
        except (BlockingIOError, OSError):
            return
        conn.close()

    def _recv(self, fd: int | socket.socket) -> bytes:
        if isinstance(fd, socket.socket):
            return fd.recv(4096)
        return os.read(fd, 4096)

    def _send(self, data: bytes) -> None:
        with self._lock:
            if self.link == "pty" and self._master is not None:
                os.write(self._master, data)
            elif self._conn is not None:
                self._conn.sendall(data)

    def _frames(self, buf: bytes) -> list[bytes]:
        out = []
        term = self.firmware.frame
        rest = buf
        while True:
            if isinstance(term, int):
                if len(rest) < term:
                    break
                out.append(rest[:term])
                rest = rest[term:]
            else:
                i = rest.find(term)
                if i < 0:
                    break
                out.append(rest[: i + len(term)])
                rest = rest[i + len(term):]
        return out

    def _serve(self, request: bytes) -> None:
        self.received.append(request)
        fault = self.fault
        if fault == "drop":
            self.exchanges.append((request, None))
            self.unplug()
            return
        if fault == "silent":
            self.exchanges.append((request, None))
            return
        reply = GARBAGE if fault == "garbage" else self.firmware.handle(request)
        if reply is DROP:
            self.exchanges.append((request, None))
            self.unplug()
            return
        self.exchanges.append((request, reply))  # type: ignore[arg-type]
        if reply:
            if self.reply_delay:
                time.sleep(self.reply_delay)
            with contextlib.suppress(OSError):
                self._send(reply)  # type: ignore[arg-type]

    # -- shutdown -----------------------------------------------------------------------------
    def close(self) -> None:
        self._stop.set()
        self._thread.join(timeout=2.0)
        with self._lock:
            self._cut()
            if self._listener is not None:
                self._listener.close()
                self._listener = None
        self._dir.cleanup()

    def __enter__(self) -> FakeDevice:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
