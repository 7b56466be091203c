"""A relay board driven by command templates: text protocols and binary frames alike.

Home-built instruments use whatever relay board is at hand, so the board is described in the
instrument config rather than in code.  A template is a string with backslash escapes
(``\\n``, ``\\r``, ``\\t``, ``\\\\``, ``\\xHH``) and fields in braces:

* ``{channel}`` / ``{state}`` format as text (any Python format spec, e.g. ``{channel:02d}``);
* ``{channel:byte}`` / ``{state:byte}`` put the value in as one raw byte;
* ``{checksum:byte}`` (or ``{checksum:02X}``) is the sum of all bytes before it, modulo 256,
  which is what the common serial USB relay modules expect in ``\\xA0{channel:byte}...``.

Characters U+0080..U+00FF in a template stand for single bytes, so a YAML double-quoted
"\\xA0" (which YAML has already decoded) means the same as a single-quoted '\\xA0'.

Normally-open/normally-closed is per valve: 'open' energises a normally-closed valve's relay
and de-energises a normally-open one.  At power-up every relay is off, so the commanded state
starts as the de-energised state of each valve.
"""

from __future__ import annotations

import logging
import re
import threading
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Annotated, Any, Literal

from pydantic import BeforeValidator, Field, field_validator

from pycnoctl.controller.domain.devices import ProtocolError
from pycnoctl.drivers import registry
from pycnoctl.drivers.fields import Seconds, SerialLink, Strict, serial_transport
from pycnoctl.drivers.transports import Transport

log = logging.getLogger(__name__)

_FIELD = re.compile(r"\{(\w+)(?::([^{}]*))?\}")
_ESCAPES = {"n": "\n", "r": "\r", "t": "\t", "\\": "\\", "0": "\0"}


def unescape(text: str) -> str:
    """Resolve backslash escapes (\\n, \\r, \\t, \\\\, \\0, \\xHH); other characters stay."""
    out: list[str] = []
    i = 0
    while i < len(text):
        ch = text[i]
        if ch != "\\" or i + 1 == len(text):
            out.append(ch)
            i += 1
            continue
        nxt = text[i + 1]
        if nxt == "x" and re.fullmatch(r"[0-9A-Fa-f]{2}", text[i + 2: i + 4]):
            out.append(chr(int(text[i + 2: i + 4], 16)))
            i += 4
        elif nxt in _ESCAPES:
            out.append(_ESCAPES[nxt])
            i += 2
        else:
            raise ValueError(f"unknown escape \\{nxt} in template {text!r}")
    return "".join(out)


def _to_bytes(text: str) -> bytes:
    try:
        return text.encode("latin-1")
    except UnicodeEncodeError as exc:
        raise ValueError(f"template has a character that is not one byte: {text!r}") from exc


@dataclass(frozen=True)
class FrameTemplate:
    """A parsed command template; render(**fields) gives the bytes to send."""

    source: str
    parts: tuple[bytes | tuple[str, str], ...]

    @classmethod
    def parse(cls, source: str, allowed: tuple[str, ...] = ("channel", "state", "checksum")) -> FrameTemplate:
        parts: list[bytes | tuple[str, str]] = []
        pos = 0
        # '{{' and '}}' are literal braces.
        text = source.replace("{{", "\x00LB\x00").replace("}}", "\x00RB\x00")
        for m in _FIELD.finditer(text):
            parts.append(_literal(text[pos: m.start()]))
            name, spec = m.group(1), m.group(2) or ""
            if name not in allowed:
                raise ValueError(f"unknown field {{{name}}} in template {source!r}; allowed: {list(allowed)}")
            parts.append((name, spec))
            pos = m.end()
        parts.append(_literal(text[pos:]))
        if "{" in text[pos:] or "}" in text[pos:]:
            raise ValueError(f"unbalanced brace in template {source!r}")
        return cls(source, tuple(p for p in parts if p != b""))

    @property
    def fields(self) -> set[str]:
        return {p[0] for p in self.parts if isinstance(p, tuple)}

    def render(self, **values: int | str) -> bytes:
        out = bytearray()
        for part in self.parts:
            if isinstance(part, bytes):
                out += part
                continue
            name, spec = part
            value: int | str = (sum(out) & 0xFF) if name == "checksum" else values[name]
            if spec == "byte":
                if not isinstance(value, int) or not 0 <= value <= 255:
                    raise ValueError(f"{{{name}:byte}} needs an integer 0..255, got {value!r}")
                out.append(value)
            else:
                out += format(value, spec).encode("ascii")
        return bytes(out)


def _literal(text: str) -> bytes:
    text = text.replace("\x00LB\x00", "{").replace("\x00RB\x00", "}")
    if "{" in text or "}" in text:
        raise ValueError(f"unbalanced brace in template near {text!r}")
    return _to_bytes(unescape(text))


@dataclass(frozen=True)
class Channel:
    """One valve on one relay. normally_open: the gas path is open with the relay off."""

    channel: int
    normally_open: bool = False

    def energise_for(self, is_open: bool) -> bool:
        return is_open != self.normally_open


@dataclass(frozen=True)
class RelayCommands:
    """How to talk to one kind of board (from the instrument config)."""

    set: str = "RELAY {channel} {state}\\n"
    energise: str | int = "ON"
    de_energise: str | int = "OFF"
    ack: str | None = r"^OK$"  # regex each set reply must match; None: the board sends no reply
    error: str | None = r"^ERR\b"  # a reply matching this is a refusal (ProtocolError)
    readback: str | None = "STATE?\\n"
    readback_regex: str = r"^STATE (?P<mask>[0-9A-Fa-f]+)$"
    mask_base: int = 16
    all_off: str | None = "ALLOFF\\n"
    ping: str | None = "PING\\n"
    ping_reply: str = r"^PONG$"
    arm_watchdog: str | None = "WDOG {seconds}\\n"  # how to arm the board's own watchdog, if it has one


class AsciiRelayBoard:
    """A ValveBank on a relay board reached through a Transport."""

    def __init__(self, transport: Transport, channels: Mapping[str, Channel], *,
                 commands: RelayCommands | None = None, name: str = "relays",
                 settle: float = 0.0, watchdog: float | None = None) -> None:
        if not channels:
            raise ValueError("a relay board needs at least one valve")
        used: dict[int, str] = {}
        for valve, ch in channels.items():
            if ch.channel in used:
                raise ValueError(f"valves {used[ch.channel]!r} and {valve!r} share relay {ch.channel}")
            used[ch.channel] = valve
        self.transport = transport
        self.channels = dict(channels)
        self.commands = commands or RelayCommands()
        self.name = name
        self.settle = settle
        c = self.commands
        self._set = FrameTemplate.parse(c.set)
        if "channel" not in self._set.fields:
            raise ValueError(f"set template {c.set!r} has no {{channel}} field")
        self._ack = re.compile(c.ack) if c.ack else None
        self._error = re.compile(c.error) if c.error else None
        self._readback = FrameTemplate.parse(c.readback, ()) if c.readback else None
        self._readback_re = re.compile(c.readback_regex)
        if self._readback and "mask" not in self._readback_re.groupindex:
            raise ValueError("readback_regex needs a named group (?P<mask>...)")
        self._all_off = FrameTemplate.parse(c.all_off, ()) if c.all_off else None
        self._ping = FrameTemplate.parse(c.ping, ()) if c.ping else None
        self._lock = threading.RLock()
        self._commanded = {v: ch.normally_open for v, ch in self.channels.items()}
        self.watchdog = watchdog
        if watchdog:
            if not c.arm_watchdog:
                raise ValueError("a watchdog was asked for, but the board has no arm_watchdog command")
            self._arm = FrameTemplate.parse(c.arm_watchdog, ("seconds",))
            self.arm_watchdog()

    def arm_watchdog(self) -> None:
        """Arm the board's own watchdog: without a command for that long it de-energises every relay
        (inlet closed, vent open on a fail-safe build), e.g. when USB is pulled or the host hangs.
        The controller's valve read-back, once a second, keeps it fed."""
        if self.watchdog:
            self._send(self._arm.render(seconds=f"{self.watchdog:g}"))

    @property
    def valve_names(self) -> tuple[str, ...]:
        return tuple(self.channels)

    def commanded(self) -> dict[str, bool]:
        with self._lock:
            return dict(self._commanded)

    def frame(self, valve: str, is_open: bool) -> bytes:
        """The bytes that put valve in the given state (no I/O)."""
        ch = self.channels[valve]
        state = self.commands.energise if ch.energise_for(is_open) else self.commands.de_energise
        return self._set.render(channel=ch.channel, state=state)

    def set_valves(self, states: Mapping[str, bool]) -> None:
        unknown = set(states) - set(self.channels)
        if unknown:
            raise KeyError(f"{self.name}: unknown valve(s) {sorted(unknown)}")
        with self._lock:
            for valve, is_open in states.items():
                self._send(self.frame(valve, bool(is_open)))
                self._commanded[valve] = bool(is_open)

    def _send(self, frame: bytes) -> None:
        t = self.transport
        with t.lock:
            if self._ack is None:
                t.write(frame)
                log.debug("%s: sent %r (no reply expected)", self.name, frame)
                return
            reply = t.query(frame)
        self._check_reply(frame, reply)

    def _check_reply(self, frame: bytes, reply: bytes) -> None:
        # A refusal is recognised anywhere in the line (fail-safe); an acknowledgement, a mask or a
        # heartbeat only when the pattern matches the whole line (the transport removed the terminator).
        text = reply.decode("ascii", "replace")
        if self._error and self._error.search(text):
            raise ProtocolError(self.name, "board refused the command", frame, reply)
        if self._ack and not self._ack.fullmatch(text):
            raise ProtocolError(self.name, "unexpected reply", frame, reply)

    def read_back(self) -> dict[str, bool] | None:
        """Valve states from the board's relay mask; None if the board has no read-back."""
        if self._readback is None:
            return None
        frame = self._readback.render()
        reply = self.transport.query(frame)
        text = reply.decode("ascii", "replace")
        m = self._readback_re.fullmatch(text)
        if not m:
            if self._error and self._error.search(text):
                raise ProtocolError(self.name, "board refused the read-back", frame, reply)
            raise ProtocolError(self.name, "read-back reply did not parse", frame, reply)
        try:
            digits = m.group("mask") or ""
            if not digits.isascii() or not digits.isalnum():  # int() would take ' 5', '0_5', '+5'
                raise ValueError(digits)
            mask = int(digits, self.commands.mask_base)
        except ValueError as exc:
            raise ProtocolError(self.name, "read-back mask is not a number", frame, reply) from exc
        return {v: bool(mask >> (ch.channel - 1) & 1) != ch.normally_open for v, ch in self.channels.items()}

    def de_energise_all(self) -> None:
        """Every relay off (the power-loss state), by the board's all-off command if it has one."""
        with self._lock:
            if self._all_off is not None:
                self._send(self._all_off.render())
            else:
                for ch in self.channels.values():
                    self._send(self._set.render(channel=ch.channel, state=self.commands.de_energise))
            self._commanded = {v: ch.normally_open for v, ch in self.channels.items()}

    def ping(self) -> bool:
        """Heartbeat: feeds the board's watchdog where the firmware has one."""
        if self._ping is None:
            return False
        frame = self._ping.render()
        reply = self.transport.query(frame)
        if not re.fullmatch(self.commands.ping_reply, reply.decode("ascii", "replace")):
            raise ProtocolError(self.name, "unexpected heartbeat reply", frame, reply)
        return True

    def reconnect(self) -> None:
        """Reopen the port by its (stable) path; the commanded state is unknown until re-asserted."""
        self.transport.reopen()
        with self._lock:
            # A board that lost power came back de-energised; assume so until commanded.
            self._commanded = {v: ch.normally_open for v, ch in self.channels.items()}
            self.arm_watchdog()

    def close(self) -> None:
        self.transport.close()


# -- config ---------------------------------------------------------------------------------------

def _template(value: Any) -> str:
    if not isinstance(value, str):
        raise ValueError("a command template must be a string")
    FrameTemplate.parse(value)  # raises ValueError with the reason
    return value


Template = Annotated[str, BeforeValidator(_template)]


class RelayCommandsModel(Strict):
    set: Template = RelayCommands.set
    energise: str | int = RelayCommands.energise
    de_energise: str | int = RelayCommands.de_energise
    ack: str | None = RelayCommands.ack
    error: str | None = RelayCommands.error
    readback: Template | None = RelayCommands.readback
    readback_regex: str = RelayCommands.readback_regex
    mask_base: Literal[2, 10, 16] = 16
    all_off: Template | None = RelayCommands.all_off
    ping: Template | None = RelayCommands.ping
    ping_reply: str = RelayCommands.ping_reply
    arm_watchdog: Template | None = RelayCommands.arm_watchdog

    def build(self) -> RelayCommands:
        return RelayCommands(**self.model_dump())


class ValveChannel(Strict):
    channel: int = Field(ge=1, le=64)
    normally: Literal["open", "closed"] = "closed"


class AsciiRelayDevice(SerialLink):
    kind: Literal["ascii_relay"]
    commands: RelayCommandsModel = RelayCommandsModel()
    valves: dict[str, ValveChannel] = Field(min_length=1)
    watchdog: Seconds | None = None  # arm the board's own watchdog (PROTOCOL.md) with this timeout

    @field_validator("valves")
    @classmethod
    def _distinct_channels(cls, valves: dict[str, ValveChannel]) -> dict[str, ValveChannel]:
        seen: dict[int, str] = {}
        for name, v in valves.items():
            if v.channel in seen:
                raise ValueError(f"valves {seen[v.channel]!r} and {name!r} are both on relay {v.channel}")
            seen[v.channel] = name
        return valves

    def valve_names(self) -> tuple[str, ...]:
        return tuple(self.valves)

    def normally_open(self, valve: str) -> bool | None:
        """Whether the valve opens when its relay is off (None: no such valve)."""
        v = self.valves.get(valve)
        return None if v is None else v.normally == "open"


def build_relay_board(dev: AsciiRelayDevice, ctx: registry.BuildContext) -> AsciiRelayBoard:
    channels = {n: Channel(v.channel, v.normally == "open") for n, v in dev.valves.items()}
    return AsciiRelayBoard(serial_transport(dev, ctx), channels, commands=dev.commands.build(),
                           name=ctx.role, watchdog=dev.watchdog)


registry.register("ascii_relay", registry.VALVES, AsciiRelayDevice, build_relay_board)
