"""VISA 4-20 mA meter on a pyvisa-sim definition file: scaling, live zero, overrange, dialogue faults."""

from __future__ import annotations

import subprocess
import sys
from importlib.resources import files

import pytest

from pycnoctl.controller.domain.clock import ManualClock
from pycnoctl.controller.domain.devices import DeviceDisconnected, Validity
from pycnoctl.drivers.transports import VisaTransport
from pycnoctl.drivers.visa_meter import LoopScaling, VisaTransducerMeter
from tests.claim_holder import held_elsewhere

SIM = f"{files('pycnoctl.drivers') / 'visa' / 'loop_meter.yaml'}@sim"
SCALE = LoopScaling(4e-3, 20e-3, 0.0, 3.5e5)  # 4 mA -> 0 bar, 20 mA -> 3.5 bar (gauge)


@pytest.fixture
def meter():
    t = VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    m = VisaTransducerMeter(t, scaling=SCALE, setup=("CONF:CURR:DC 0.1", "CURR:DC:NPLC 1"),
                            clock=ManualClock(3.0))
    yield m
    m.close()


def set_current(m: VisaTransducerMeter, amps: float) -> None:
    m.transport.write(f"SIM:CURR {amps:.9f}".encode())


@pytest.mark.parametrize(("ma", "bar"), [(4.0, 0.0), (12.0, 1.75), (20.0, 3.5), (8.0, 0.875)])
def test_linear_scaling(meter, ma, bar):
    # two-point linear transfer function of a 4-20 mA transmitter (common practice)
    set_current(meter, ma * 1e-3)
    r = meter.read()
    assert r.valid and r.t == 3.0
    assert r.value == pytest.approx(bar * 1e5, abs=1e-3)


@pytest.mark.parametrize(("ma", "validity"), [
    (0.0, Validity.OPEN_LOOP),  # broken wire: no current at all
    (3.5, Validity.OPEN_LOOP),  # below the 3.6 mA limit (NAMUR NE 43 failure band, from memory)
    (20.6, Validity.OUT_OF_RANGE),
])
def test_live_zero_and_overrange(meter, ma, validity):
    set_current(meter, ma * 1e-3)
    r = meter.read()
    assert r.validity is validity and not r.valid


def test_open_loop_is_never_zero_pressure(meter):
    set_current(meter, 0.0)
    r = meter.read()
    assert r.value != r.value  # NaN, not 0 bar


def test_between_live_zero_limit_and_4ma_reads_slightly_negative(meter):
    set_current(meter, 3.8e-3)  # within tolerance of live zero: a valid, slightly negative gauge pressure
    r = meter.read()
    assert r.valid and r.value == pytest.approx(-0.2e-3 / 16e-3 * 3.5e5)


def test_scpi_overload_and_garbage():
    assert SCALE.classify(9.9e37)[1] is Validity.OUT_OF_RANGE
    assert SCALE.classify(9.91e37)[1] is Validity.NAN
    assert SCALE.classify(float("nan"))[1] is Validity.NAN


def test_garbled_reply_and_timeout():
    t = VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    garbled = VisaTransducerMeter(t, scaling=SCALE, query="SYST:BAD?", clock=ManualClock())
    assert garbled.read().validity is Validity.GARBLED
    silent = VisaTransducerMeter(t, scaling=SCALE, query="*RST", clock=ManualClock())  # no reply defined
    assert silent.read().validity is Validity.TIMEOUT
    t.close()
    assert garbled.read().validity is Validity.DISCONNECTED  # session gone
    garbled.reconnect()
    assert garbled.read().validity is Validity.GARBLED  # talking again (still the bad query)
    t.close()


def test_voltage_output():
    # a 0-10 V transducer, 0..10 bar, no live zero
    t = VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    m = VisaTransducerMeter(t, scaling=LoopScaling(0.0, 10.0, 0.0, 1e6, open_loop_below=None,
                                                   over_above=10.5),
                            query="MEAS:VOLT:DC?", clock=ManualClock())
    t.write(b"SIM:VOLT 2.5")
    assert m.read().value == pytest.approx(2.5e5)
    m.close()


def test_a_second_program_on_one_visa_resource_is_refused_until_the_first_lets_go():
    # found by a sweep: two runs on two data folders opened one VISA meter at once (VISA does not refuse
    # it); a claim per resource now keeps pycnoctl processes apart, as the serial port's flock does, under
    # any spelling of the resource's name
    for spelling in ("TCPIP::127.0.0.1::INSTR", "tcpip0::localhost::inst0::instr"):
        with held_elsewhere("visa", spelling), \
                pytest.raises(DeviceDisconnected, match="in use by another pycnoctl run or daemon"):
            VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2).close()  # a killed holder leaves none


def test_one_process_shares_its_claim_so_one_config_may_read_two_channels_of_one_meter():
    # found by a sweep: a config reading the cell pressure and the supply from one meter refused itself
    pressure = VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    supply = VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    pressure.reopen()  # a reconnect keeps its claim
    pressure.close()
    probe = subprocess.run([sys.executable, "-c", _TRY], capture_output=True, text=True, check=False)
    assert "in use by another pycnoctl" in probe.stdout  # the supply's channel still holds it
    supply.close()
    probe = subprocess.run([sys.executable, "-c", _TRY], capture_output=True, text=True, check=False)
    assert probe.stdout.strip() == "opened", probe.stdout + probe.stderr


_TRY = (f"from pycnoctl.drivers.transports import VisaTransport\n"
        f"try:\n    VisaTransport('TCPIP::127.0.0.1::INSTR', backend={SIM!r}, timeout=0.2).close(); print('opened')\n"
        f"except Exception as exc:\n    print(exc)\n")
