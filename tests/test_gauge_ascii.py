"""ASCII gauge: parsing and scaling, units through pint, every failure as an invalid Reading."""

from __future__ import annotations

import math
import re

import pytest
import scipy.constants as sc

from pycnoctl.controller.domain.clock import ManualClock
from pycnoctl.controller.domain.devices import Validity
from pycnoctl.drivers.gauge_ascii import AsciiGauge, GaugeFormat, classify_text, si_converter
from pycnoctl.drivers.transports import SerialTransport
from pycnoctl.sim.fakedev import FakeDevice, GaugeFirmware, ScriptedSensor, ScriptedTransport


def classify(text, **kw):
    fmt = GaugeFormat(**kw)
    to_si, _ = si_converter("pressure", fmt.unit)
    return classify_text(text, fmt, to_si, re.compile(fmt.regex))


@pytest.mark.parametrize(("unit", "pa"), [
    ("bar", sc.bar), ("psi", sc.psi), ("torr", sc.torr), ("kPa", 1e3), ("atm", sc.atm),
    # conventional millimetre of mercury, NIST SP 811 (2008) appendix B.8: 133.322 387 415 Pa
    # (scipy.constants.mmHg is the torr, 101325/760 Pa, so it is not used here)
    ("mmHg", 133.322387415),
])
def test_units_match_references(unit, pa):
    # reference: scipy.constants (CODATA/NIST unit definitions) unless noted
    value, validity, _ = classify(f"P 1.000 {unit}", unit=unit)
    assert validity is Validity.VALID
    assert value == pytest.approx(pa, rel=1e-9)


def test_gain_and_offset():
    # a transducer reporting counts: 0..10000 counts = 0..4 bar, pressure = raw*gain + offset
    value, validity, _ = classify("P 2500 bar", unit="bar", gain=4.0 / 10000, offset=-0.01)
    assert validity is Validity.VALID
    assert value == pytest.approx((2500 * 4e-4 - 0.01) * sc.bar)


@pytest.mark.parametrize(("text", "validity"), [
    ("P NaN kPa", Validity.NAN),
    ("P nan kPa", Validity.NAN),
    ("P OVER kPa", Validity.OUT_OF_RANGE),
    ("P under kPa", Validity.OUT_OF_RANGE),
    ("P 1e999 kPa", Validity.OUT_OF_RANGE),
    ("P inf kPa", Validity.GARBLED),  # not a decimal number (PROTOCOL.md)
    ("P 12,3 kPa", Validity.GARBLED),
    # whole-reply matching: a prefix that parses is not a reading
    ("P 9 5 kPa", Validity.GARBLED),
    ("P 12.5", Validity.GARBLED),  # no unit
    ("P 12.5 bar", Validity.GARBLED),  # not the configured unit
    ("P 12.5 kPa junk", Validity.GARBLED),
    (" P 12.5 kPa", Validity.GARBLED),
    ("P 1_000 kPa", Validity.GARBLED),  # float() would take it
    ("P 12.5 kPa\n", Validity.GARBLED),  # a terminator left in the line: two lines run together
    ("\x8f#?\x00", Validity.GARBLED),
    ("", Validity.GARBLED),
    ("T 21.0", Validity.GARBLED),
])
def test_bad_replies_are_typed(text, validity):
    value, got, detail = classify(text)
    assert got is validity and math.isnan(value) and detail


def test_rated_span():
    assert classify("P 401 kPa", range_max=400e3)[1] is Validity.OUT_OF_RANGE
    assert classify("P -6 kPa", range_min=-5e3)[1] is Validity.OUT_OF_RANGE
    assert classify("P 399.9 kPa", range_max=400e3)[1] is Validity.VALID


def test_read_is_time_stamped_by_the_instrument_clock_and_never_raises():
    clock = ManualClock(42.0)
    t = ScriptedTransport([(b"P?\n", b"P 101.325 kPa\n"), (b"P?\n", None), (b"P?\n", b"garbage\n")])
    g = AsciiGauge(t, clock=clock)
    r = g.read()
    assert r.valid and r.value == pytest.approx(101325.0) and r.t == 42.0 and r.unit == "Pa"
    r = g.read()
    assert r.validity is Validity.TIMEOUT and math.isnan(r.value)
    assert g.read().validity is Validity.GARBLED


def test_custom_dialect():
    # a gauge that answers "#01?" with "*01 +1.2345E+00 bar" style replies
    fmt = GaugeFormat(query="#01?\\r", regex=r"^\*01\s+(?P<value>[-+0-9.Ee]+)", unit="bar")
    t = ScriptedTransport([(b"#01?\r", b"*01 +1.2345E+00\r\n")])
    r = AsciiGauge(t, fmt=fmt, clock=ManualClock()).read()
    assert r.value == pytest.approx(1.2345 * sc.bar)


def test_regex_needs_value_group():
    with pytest.raises(ValueError, match="value"):
        AsciiGauge(ScriptedTransport([]), fmt=GaugeFormat(regex=r"^P (\S+)"))


def test_thermometer_in_degc():
    # 0 degC = 273.15 K (ITS-90 / SI definition of the Celsius scale)
    fmt = GaugeFormat(query="T?\\n", regex=r"^T\s+(?P<value>\S+)", unit="degC")
    t = ScriptedTransport([(b"T?\n", b"T 21.50\n")])
    r = AsciiGauge(t, fmt=fmt, clock=ManualClock(), quantity="temperature").read()
    assert r.unit == "K" and r.value == pytest.approx(273.15 + 21.5)


@pytest.mark.parametrize("link", ["pty", "tcp"])
def test_through_fake_gauge_follows_backing_validity(link):
    sensor = ScriptedSensor(150e3)
    with FakeDevice(GaugeFirmware(sensor, unit="bar"), link=link) as dev:
        link_t = SerialTransport(dev.url, timeout=0.2)
        g = AsciiGauge(link_t, fmt=GaugeFormat(unit="bar"), clock=ManualClock())
        assert g.read().value == pytest.approx(150e3, abs=10.0)  # 4 decimals of bar = 10 Pa
        sensor.script = [Validity.NAN, Validity.OUT_OF_RANGE, Validity.GARBLED, Validity.TIMEOUT,
                         Validity.DISCONNECTED]
        got = [g.read().validity for _ in range(5)]
        assert got == [Validity.NAN, Validity.OUT_OF_RANGE, Validity.GARBLED, Validity.TIMEOUT,
                       Validity.DISCONNECTED]
        assert g.read().validity is Validity.DISCONNECTED  # stays down until reconnected
        dev.replug()
        g.reconnect()
        assert g.read().valid
        g.close()


def test_device_faults_silent_and_garbage():
    sensor = ScriptedSensor(2e5)
    with FakeDevice(GaugeFirmware(sensor)) as dev:
        g = AsciiGauge(SerialTransport(dev.url, timeout=0.2), clock=ManualClock())
        dev.fault = "silent"
        assert g.read().validity is Validity.TIMEOUT
        dev.fault = "garbage"
        assert g.read().validity is Validity.GARBLED
        dev.fault = None
        assert g.read().valid  # a late reply was not mistaken for the next one
        g.close()
