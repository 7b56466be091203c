"""Transports: pyserial's silent/partial reads become DeviceTimeout, lost links DeviceDisconnected."""

from __future__ import annotations

import logging
import threading

import pytest

from pycnoctl.controller.domain.devices import DeviceDisconnected, DeviceTimeout
from pycnoctl.drivers.transports import SerialTransport, Transport, VisaTransport
from pycnoctl.sim.fakedev import FakeDevice, GaugeFirmware, ScriptedSensor
from tests.claim_holder import held_elsewhere


def test_loop_query_and_log(caplog):
    t = SerialTransport("loop://", name="loop", timeout=0.1)
    assert isinstance(t, Transport)
    with caplog.at_level(logging.DEBUG, logger="pycnoctl.drivers.transports"):
        assert t.query(b"P 1.0\n") == b"P 1.0"  # loop:// echoes
    assert "loop: sent b'P 1.0\\n', got b'P 1.0'" in caplog.text
    t.close()


def test_partial_line_is_timeout_not_data():
    # pyserial returns whatever arrived before the timeout, without an exception
    t = SerialTransport("loop://", timeout=0.05)
    with pytest.raises(DeviceTimeout) as info:
        t.query(b"P 1.0")  # no terminator comes back
    assert info.value.reply == b"P 1.0"
    assert "partial" in str(info.value)
    t.close()


def test_crlf_is_stripped_and_custom_eol():
    t = SerialTransport("loop://", timeout=0.05, eol=b"\r")
    assert t.query(b"ID?\r") == b"ID?"
    t.close()


def test_read_exact_short_is_timeout():
    t = SerialTransport("loop://", timeout=0.05)
    t.write(b"\xa0\x01")
    with pytest.raises(DeviceTimeout):
        t.read_exact(4)
    t.close()


def test_cannot_open_is_disconnected(tmp_path):
    with pytest.raises(DeviceDisconnected, match="cannot open"):
        SerialTransport(str(tmp_path / "no-such-tty"))


def test_a_port_another_program_holds_is_refused_until_it_lets_go():
    """Found by a sweep: two pycnoctl processes (two data folders) opened one relay board's port and drove
    its valves at once.  A serial device is now opened exclusively (pyserial's flock on the device path)."""
    with FakeDevice(GaugeFirmware(ScriptedSensor(1e5)), link="pty") as dev:
        first = SerialTransport(dev.url, timeout=0.3)
        with pytest.raises(DeviceDisconnected, match="in use by another program"):
            SerialTransport(dev.url, timeout=0.3)
        first.close()
        second = SerialTransport(dev.url, timeout=0.3)
        assert second.query(b"P?\n").startswith(b"P ")
        second.close()


def test_a_network_bridge_another_run_holds_is_refused_until_it_lets_go():
    """A serial link over a TCP bridge (socket://) has no flock: a claim per host and port keeps a second
    pycnoctl run off it (one program per device, as on a device path), whatever the URL's options or the
    host's spelling; loop:// is per process and takes none, in any case."""
    with FakeDevice(GaugeFirmware(ScriptedSensor(1e5)), link="tcp") as dev:
        assert dev.url.startswith("socket://")
        port = dev.url.rsplit(":", 1)[1]
        for spelling in (dev.url, f"SOCKET://localhost:{port}?logging=debug"):
            with held_elsewhere("serial", spelling), \
                    pytest.raises(DeviceDisconnected, match="in use by another pycnoctl run or daemon"):
                SerialTransport(dev.url, timeout=0.3)
        second = SerialTransport(dev.url, timeout=0.3)
        assert second.query(b"P?\n").startswith(b"P ")
        second.close()
    for url in ("loop://", "LOOP://"):
        a, b = SerialTransport(url), SerialTransport(url)
        a.close()
        b.close()


def test_closed_port_is_disconnected():
    t = SerialTransport("loop://")
    t.close()
    with pytest.raises(DeviceDisconnected):
        t.write(b"x")


@pytest.mark.parametrize("link", ["pty", "tcp"])
def test_unplug_mid_read_then_reopen_same_path(link):
    with FakeDevice(GaugeFirmware(ScriptedSensor(1e5)), link=link) as dev:
        t = SerialTransport(dev.url, timeout=0.3)
        assert t.query(b"P?\n").startswith(b"P ")
        dev.fault = "drop"  # request arrives, the device vanishes before answering
        with pytest.raises(DeviceDisconnected) as info:
            t.query(b"P?\n")
        assert info.value.command == b"P?\n"
        assert not t.is_open
        dev.fault = None
        dev.replug()
        t.reopen()
        assert t.query(b"P?\n").startswith(b"P ")
        t.close()


def test_one_lock_per_transport_keeps_exchanges_whole():
    with FakeDevice(GaugeFirmware(ScriptedSensor(1e5))) as dev:
        t = SerialTransport(dev.url, timeout=1.0)
        replies: list[bytes] = []

        def worker(cmd: bytes) -> None:
            for _ in range(20):
                replies.append(t.query(cmd))

        threads = [threading.Thread(target=worker, args=(c,)) for c in (b"P?\n", b"ID?\n")]
        for th in threads:
            th.start()
        for th in threads:
            th.join(10)
        assert sum(r.startswith(b"P ") for r in replies) == 20
        assert sum(r.startswith(b"ID ") for r in replies) == 20
        t.close()


def test_visa_transport_on_pyvisa_sim(visa_file):
    t = VisaTransport("TCPIP::127.0.0.1::INSTR", backend=f"{visa_file}@sim", timeout=0.2)
    assert t.query(b"*IDN?") == b"FAKE,LOOPMETER,0001,1.0"
    t.write(b"*RST")  # no reply defined
    with pytest.raises(DeviceTimeout):
        t.readline()
    t.reopen()
    assert t.query(b"*IDN?").startswith(b"FAKE")
    t.close()
    with pytest.raises(DeviceDisconnected):
        t.query(b"*IDN?")


@pytest.fixture
def visa_file():
    from importlib.resources import files

    return str(files("pycnoctl.drivers") / "visa" / "loop_meter.yaml")
