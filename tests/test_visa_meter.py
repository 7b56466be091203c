"""VISA 4-20 mA meter on a pyvisa-sim definition file: scaling, live zero, overrange, dialogue faults."""

from __future__ import annotations

from importlib.resources import files

import pytest

from pycnoctl.controller.domain.clock import ManualClock
from pycnoctl.controller.domain.devices import DeviceDisconnected, Validity
from pycnoctl.drivers.transports import VisaTransport
from pycnoctl.drivers.visa_meter import LoopScaling, VisaTransducerMeter

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


def test_a_second_program_on_one_visa_resource_is_refused_until_the_first_closes():
    # found by a sweep: two runs on two data folders opened one VISA meter at once (VISA does not refuse
    # it); a claim per resource now keeps pycnoctl processes apart, as the serial port's flock does
    first = VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    with pytest.raises(DeviceDisconnected, match="in use by another pycnoctl run or daemon"):
        VisaTransport("tcpip::127.0.0.1::instr", backend=SIM, timeout=0.2)  # names are case-insensitive
    other = VisaTransport("TCPIP::127.0.0.2::INSTR", backend=SIM, timeout=0.2, open_now=False)
    first.reopen()  # a reconnect keeps its own claim
    first.close()
    again = VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    again.close()
    assert not other.is_open


def test_the_claim_keeps_another_process_off_and_goes_with_it():
    import subprocess
    import sys

    holder = subprocess.Popen(
        [sys.executable, "-c", "import sys, time; from pycnoctl.drivers.claims import ResourceClaim; "
         "ResourceClaim('visa', 'TCPIP::127.0.0.1::INSTR', 'meter').take(); print('held', flush=True); time.sleep(60)"],
        stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        with pytest.raises(DeviceDisconnected, match="in use by another pycnoctl"):
            VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2)
    finally:
        holder.kill()
        holder.wait()
    VisaTransport("TCPIP::127.0.0.1::INSTR", backend=SIM, timeout=0.2).close()  # a killed holder leaves none
