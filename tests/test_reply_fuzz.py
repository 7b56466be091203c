"""Byte-level fuzz of every text reply parser: malformed frames are never read as valid numbers.

Frames are built by mutating well-formed replies (byte flips, insertions, deletions, truncations,
a missing unit, a doubled number, a wrong terminator) and fed through the real serial framing
(SerialTransport on pyserial's loop://, whose 'device' answers each command with the next frame).
Whether a frame is well-formed is decided by an oracle written here from drivers/PROTOCOL.md with
plain splitting, not with the drivers' patterns, so the test can disagree with the drivers.  Each
test prints the share of fuzzed frames read as valid (run pytest with -s to see it).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pycnoctl.controller.domain.clock import ManualClock
from pycnoctl.controller.domain.devices import DeviceError
from pycnoctl.drivers.gauge_ascii import AsciiGauge, GaugeFormat
from pycnoctl.drivers.relay_ascii import AsciiRelayBoard, Channel
from pycnoctl.drivers.transports import SerialTransport
from pycnoctl.drivers.visa_meter import LoopScaling, classify_reply

EXAMPLES = 1500
FUZZ = settings(max_examples=EXAMPLES, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])


class FedLoop(SerialTransport):
    """loop:// whose far end answers every command with `frame` (the command itself is dropped).

    After the frame the far end falls silent at once (pyserial's cancel_read ends the read), so an
    unterminated frame is a partial reply without waiting out a timeout.  It never answers late,
    so no reply is owed between frames (the late-reply rule has its own tests).
    """

    frame = b""

    def query(self, data: bytes, timeout: float | None = None) -> bytes:
        self._owed_until = None
        return super().query(data, timeout)

    def _write(self, data: bytes) -> None:
        port = self._live(data)
        port.reset_input_buffer()
        port.write(self.frame)
        port.cancel_read()


def fed_loop() -> FedLoop:
    return FedLoop("loop://", timeout=0.5)


# -- mutations ------------------------------------------------------------------------------------

def _flip(frame: bytes, i: int, b: int) -> bytes:
    i %= len(frame)
    return frame[:i] + bytes([b]) + frame[i + 1:]


def _insert(frame: bytes, i: int, b: int) -> bytes:
    i %= len(frame) + 1
    return frame[:i] + bytes([b]) + frame[i:]


def _delete(frame: bytes, i: int, _b: int) -> bytes:
    i %= len(frame)
    return frame[:i] + frame[i + 1:]


def _truncate(frame: bytes, i: int, _b: int) -> bytes:
    return frame[: i % len(frame)]


def _wrong_terminator(frame: bytes, i: int, _b: int) -> bytes:
    return frame.rstrip(b"\n") + [b"", b"\r", b"\n\n", b"\r\r\n", b"\x00\n", b" \n", b"\t\n"][i % 7]


MUTATIONS: list[Callable[[bytes, int, int], bytes]] = [_flip, _insert, _delete, _truncate, _wrong_terminator]

# bytes a corrupted line is likely to hold: digits, signs, spaces, separators, controls, high bytes
INTERESTING = st.one_of(st.sampled_from(b"0123456789+-.eE ,_\t\r\n\x00\xff\x8fPkKa"), st.integers(0, 255))


def mutated(well_formed: st.SearchStrategy[bytes], specials: Callable[[bytes], list[bytes]]
            ) -> st.SearchStrategy[tuple[bytes, bytes]]:
    """(original, frame): one to three random mutations, or a structural one from `specials`."""

    @st.composite
    def build(draw: st.DrawFn) -> tuple[bytes, bytes]:
        original = draw(well_formed)
        if draw(st.integers(0, 4)) == 0:
            return original, draw(st.sampled_from(specials(original)))
        frame = original
        for _ in range(draw(st.integers(1, 3))):
            if not frame:
                break
            op = draw(st.sampled_from(MUTATIONS))
            frame = op(frame, draw(st.integers(0, 200)), draw(INTERESTING))
        return original, frame

    return build()


def report(name: str, stats: Counter[str]) -> None:
    share = stats["valid"] / stats["total"]
    print(f"\n{name}: {stats['valid']} of {stats['total']} fuzzed frames read as valid ({share:.1%}); "
          f"{stats['malformed_valid']} malformed frames read as valid; "
          f"{stats['well_formed']} frames well-formed by the oracle")


# -- the gauge: 'P <value> <unit>\n' ------------------------------------------------------------

NUMBERS = st.one_of(
    st.integers(-10**6, 10**6).map(str),
    st.floats(-1e6, 1e6, allow_nan=False).map(lambda x: f"{x:.4f}"),
    st.floats(-1e6, 1e6, allow_nan=False).map(lambda x: f"{x:+.6E}"),
)
WORDS = st.sampled_from(["NaN", "OVER", "UNDER"])


def gauge_frames() -> st.SearchStrategy[bytes]:
    return st.one_of(NUMBERS, WORDS).map(lambda v: f"P {v} kPa\n".encode())


def gauge_specials(frame: bytes) -> list[bytes]:
    head, value, _unit = frame.rstrip(b"\n").split(b" ")
    return [
        head + b" " + value + b"\n",  # missing unit
        head + b" " + value + b" " + value + b" kPa\n",  # doubled number
        head + b" " + value[:1] + b" " + value[1:] + b" kPa\n",  # a space inside the number
        head + b" " + value + b" kPa " + value + b"\n",
        head + b" " + value + b" kPa\r",  # wrong terminator
        head + b" " + value + b" kPa",  # none
        head + b" " + value + b" bar\n",  # another unit
        frame + frame,  # two replies in one read: the first is whole, so it is fine to read it
    ]


def oracle_gauge(frame: bytes) -> float | None:
    """The value in kPa if the first line of `frame` is a well-formed reading per PROTOCOL.md."""
    line, sep, _rest = frame.partition(b"\n")
    if not sep:
        return None
    line = line.rstrip(b"\r")  # serial framing: a CR before the LF is tolerated
    parts = line.split(b" ")
    if len(parts) != 3 or parts[0] != b"P" or parts[2] != b"kPa":
        return None
    token = parts[1]
    if not token or any(c not in b"0123456789+-.eE" for c in token):
        return None
    try:
        value = float(token)
    except ValueError:
        return None
    return value if math.isfinite(value) else None


def test_gauge_reply_fuzz():
    link = fed_loop()
    gauge = AsciiGauge(link, fmt=GaugeFormat(), clock=ManualClock())
    stats: Counter[str] = Counter()

    @FUZZ
    @given(mutated(gauge_frames(), gauge_specials))
    def check(case: tuple[bytes, bytes]) -> None:
        original, frame = case
        link.frame = frame
        r = gauge.read()  # never raises
        expected = oracle_gauge(frame)
        stats["total"] += 1
        stats["valid"] += r.valid
        stats["well_formed"] += expected is not None
        if r.valid:
            stats["malformed_valid"] += expected is None
            assert expected is not None, f"malformed frame {frame!r} read as {r.value} Pa"
            assert r.value == pytest.approx(expected * 1e3, rel=1e-12, abs=1e-9)
        # the drivers must not be stricter than the protocol either
        elif expected is not None:
            raise AssertionError(f"well-formed frame {frame!r} read as {r.validity.value}: {r.detail}")
        link.frame = original
        assert gauge.read().valid == (oracle_gauge(original) is not None)

    check()
    report("gauge", stats)
    assert stats["malformed_valid"] == 0
    assert 0 < stats["valid"] < stats["total"]  # both kinds were exercised


def test_the_reported_prefix_frames_are_refused():
    link = fed_loop()
    gauge = AsciiGauge(link, clock=ManualClock())
    for frame in (b"P 9 5 kPa\n", b"P 12.5\n", b"P 12.5 kPa", b"P 1_0 kPa\n", b"P 12.5 kPa x\n"):
        link.frame = frame
        assert not gauge.read().valid, frame


# -- the relay board: 'OK\n', 'STATE <hex>\n', 'PONG\n' -------------------------------------------

CHANNELS = {"inlet": Channel(1), "vent": Channel(2, normally_open=True), "small": Channel(3),
            "large": Channel(4)}


def relay_specials(frame: bytes) -> list[bytes]:
    body = frame.rstrip(b"\n")
    return [body, body + b"\r", body + b" " + body + b"\n", b" " + frame, body + b"x\n",
            body.lower() + b"\n", frame + frame]


def oracle_state(frame: bytes) -> int | None:
    line, sep, _ = frame.partition(b"\n")
    line = line.rstrip(b"\r")
    parts = line.split(b" ")
    if not sep or len(parts) != 2 or parts[0] != b"STATE" or not parts[1]:
        return None
    if any(c not in b"0123456789abcdefABCDEF" for c in parts[1]):
        return None
    return int(parts[1], 16)


def test_relay_readback_fuzz():
    link = fed_loop()
    board = AsciiRelayBoard(link, CHANNELS)
    stats: Counter[str] = Counter()
    masks = st.integers(0, 0xFFFF).map(lambda m: f"STATE {m:04X}\n".encode())

    @FUZZ
    @given(mutated(masks, relay_specials))
    def check(case: tuple[bytes, bytes]) -> None:
        _original, frame = case
        link.frame = frame
        expected = oracle_state(frame)
        stats["total"] += 1
        stats["well_formed"] += expected is not None
        try:
            got = board.read_back()
        except DeviceError:
            assert expected is None, f"well-formed {frame!r} refused"
            return
        stats["valid"] += 1
        stats["malformed_valid"] += expected is None
        assert expected is not None, f"malformed read-back {frame!r} read as {got}"
        want = {v: bool(expected >> (ch.channel - 1) & 1) != ch.normally_open for v, ch in CHANNELS.items()}
        assert got == want

    check()
    report("relay read-back", stats)
    assert stats["malformed_valid"] == 0 and stats["valid"] > 0


@pytest.mark.parametrize(("well_formed", "command"), [(b"OK\n", "set"), (b"PONG\n", "ping")])
def test_relay_ack_and_heartbeat_fuzz(well_formed, command):
    link = fed_loop()
    board = AsciiRelayBoard(link, CHANNELS)
    stats: Counter[str] = Counter()

    @FUZZ
    @given(mutated(st.just(well_formed), relay_specials))
    def check(case: tuple[bytes, bytes]) -> None:
        _original, frame = case
        link.frame = frame
        ok = frame.partition(b"\n")[0].rstrip(b"\r") == well_formed.rstrip(b"\n") and b"\n" in frame
        stats["total"] += 1
        stats["well_formed"] += ok
        try:
            if command == "set":
                board.set_valves({"small": True})
            else:
                board.ping()
        except DeviceError:
            assert not ok, f"well-formed {frame!r} refused"
            return
        stats["valid"] += 1
        stats["malformed_valid"] += not ok
        assert ok, f"malformed {command} reply {frame!r} accepted"

    check()
    report(f"relay {command} reply", stats)
    assert stats["malformed_valid"] == 0 and stats["valid"] > 0


# -- the VISA meter: one SCPI number per message --------------------------------------------------

def test_visa_meter_reply_fuzz():
    """VISA frames messages by its read termination; the parser sees the message without it, so the
    fuzz feeds messages (a wrong terminator is a stray byte at the end of the message)."""
    scaling = LoopScaling(4e-3, 20e-3, 0.0, 3.5e5, open_loop_below=None, over_above=None)
    stats: Counter[str] = Counter()
    currents = st.floats(-0.05, 0.05, allow_nan=False).map(lambda a: f"{a:+.8E}\n".encode())

    def specials(frame: bytes) -> list[bytes]:
        body = frame.rstrip(b"\n")
        return [body + b"," + body + b"\n", body + b" A\n", body + b"\r\n", b" " + frame,
                body[:-3] + b"\n", body + b";\n"]

    @FUZZ
    @given(mutated(currents, specials))
    def check(case: tuple[bytes, bytes]) -> None:
        _original, frame = case
        if not frame.endswith(b"\n"):
            return  # VISA would wait for the termination: a time-out, not a parse
        message = frame[:-1]
        value, validity, _ = classify_reply(message, scaling)
        token = message.split(b",")
        expected = None
        if len(token) == 1 and token[0] and all(c in b"0123456789+-.eE" for c in token[0]):
            try:
                expected = float(token[0])
            except ValueError:
                expected = None
        stats["total"] += 1
        stats["well_formed"] += expected is not None
        valid = validity.value == "valid"
        stats["valid"] += valid
        if valid:
            stats["malformed_valid"] += expected is None
            assert expected is not None, f"malformed message {message!r} read as {value}"
            assert value == pytest.approx(scaling.to_pressure(expected))

    check()
    report("visa meter", stats)
    assert stats["malformed_valid"] == 0 and stats["valid"] > 0


# -- the Modbus gauge: RTU response frames --------------------------------------------------------

def crc16_modbus(data: bytes) -> int:
    """CRC-16/MODBUS (reflected polynomial 0xA001, initial 0xFFFF; Modbus over serial line spec)."""
    crc = 0xFFFF
    for b in data:
        crc ^= b
        for _ in range(8):
            crc = (crc >> 1) ^ 0xA001 if crc & 1 else crc >> 1
    return crc


def rtu_frame(word: int, dev: int = 1, fc: int = 3) -> bytes:
    body = bytes([dev, fc, 2]) + word.to_bytes(2, "big")
    return body + crc16_modbus(body).to_bytes(2, "little")


def intact_words(data: bytes) -> set[int]:
    """Register values of every intact 7-byte response (device 1, function 3, one register, CRC) in data."""
    out = set()
    for i in range(len(data) - 6):
        f = data[i:i + 7]
        if f[:3] == b"\x01\x03\x02" and crc16_modbus(f[:5]) == int.from_bytes(f[5:], "little"):
            out.add(int.from_bytes(f[3:5], "big"))
    return out


def test_modbus_rtu_reply_fuzz():
    """Frames go through pymodbus's own RTU framer (as the serial client does), then the gauge's
    checks.  A reading is valid only if an intact response frame for our request is in the bytes
    and the value is that frame's register: the CRC is what makes an RTU frame well-formed."""
    from pymodbus.exceptions import ModbusException
    from pymodbus.framer import FramerRTU
    from pymodbus.pdu import DecodePDU

    from pycnoctl.drivers.modbus_gauge import ModbusGauge, RegisterMap

    gauge = ModbusGauge(None, RegisterMap(address=0, datatype="uint16", unit="Pa"), clock=ManualClock())
    stats: Counter[str] = Counter()

    def specials(frame: bytes) -> list[bytes]:
        word = int.from_bytes(frame[3:5], "big")
        return [frame[:-2], frame[:-1] + bytes([frame[-1] ^ 1]), rtu_frame(word, dev=2), rtu_frame(word, fc=4),
                frame[:3] + frame[3:5] * 2 + frame[5:], frame[:2] + b"\x04" + frame[3:5] * 2 + frame[5:],
                b"\x83\x02" + frame, frame + frame]

    @FUZZ
    @given(mutated(st.integers(0, 0xFFFF).map(rtu_frame), specials))
    def check(case: tuple[bytes, bytes]) -> None:
        _original, frame = case
        try:
            _used, pdu = FramerRTU(DecodePDU(False)).handleFrame(frame, 1, 0)
        except ModbusException:
            pdu = None
        r = gauge.interpret(pdu, 0.0) if pdu is not None else None
        good = intact_words(frame)
        stats["total"] += 1
        stats["well_formed"] += bool(good)
        if r is not None and r.valid:
            stats["valid"] += 1
            stats["malformed_valid"] += not good
            assert good, f"frame {frame.hex()} with no intact response read as {r.value} Pa"
            assert int(r.value) in good

    check()
    report("modbus rtu", stats)
    assert stats["malformed_valid"] == 0 and stats["valid"] > 0
