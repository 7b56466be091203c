"""Instrument config: shipped examples load, mistakes come back as file:line:col, build and fail-safe."""

from __future__ import annotations

import logging
from importlib.resources import files
from pathlib import Path

import pytest
import yaml

from pycnoctl.controller.domain.devices import ForbiddenValveState, Reading, Validity
from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.drivers.config import build_instrument, load_instrument_config, reconnect_instrument
from pycnoctl.drivers.guarded import GuardedValveBank
from pycnoctl.sim.config import load_sim_config
from pycnoctl.sim.fakedev import FakeDevice, GaugeFirmware, MemoryValveBank, RelayFirmware

EXAMPLES = files("pycnoctl.drivers") / "instruments"
USB = Path(str(EXAMPLES / "usb-relay-serial-gauge.yaml"))


@pytest.mark.parametrize("name", ["usb-relay-serial-gauge", "binary-relay-visa-meter", "simulated"])
def test_shipped_examples_load(name):
    cfg = load_instrument_config(Path(str(EXAMPLES / f"{name}.yaml")))
    assert cfg.name


def test_usb_example_values_in_si():
    cfg = load_instrument_config(USB)
    assert cfg.chambers.cell == pytest.approx(12.0e-6)  # 1 cm^3 = 1e-6 m^3
    assert cfg.limits.max_pressure == pytest.approx(180e3)
    assert cfg.limits.relief_setting == pytest.approx(250e3)
    assert cfg.limits.max_rise_rate == pytest.approx(60e3)
    assert cfg.pressure.range.max == pytest.approx(400e3)
    assert cfg.valves.valves["vent"].normally == "open"
    assert cfg.forbidden_sets() == [frozenset({"inlet", "vent"})]


def write_variant(tmp_path: Path, old: str, new: str) -> Path:
    text = USB.read_text()
    assert old in text, old
    p = tmp_path / "lab.yaml"
    p.write_text(text.replace(old, new, 1))
    return p


def line_of(path: Path, needle: str) -> int:
    return next(i for i, line in enumerate(path.read_text().splitlines(), 1) if needle in line)


@pytest.mark.parametrize(("old", "new", "needle", "message"), [
    ("  baudrate: 115200\n", "  baudrate: 115200\n  baud: 9600\n", "baud: 9600", "unknown key 'baud'"),
    ("cell: 12.0 cm^3", "cell: 12.0 furlong", "cell:", "is not a volume"),
    ("cell: 12.0 cm^3", "cell: 12.0 blorps", "cell:", "unknown unit"),
    ("cell: 12.0 cm^3", "cell: 12.0", "cell:", "give a unit"),
    ("max_pressure: 180 kPa", "max_pressure: 260 kPa", "max_pressure", "below the relief"),
    ("  inlet: inlet\n  vent: vent", "  inlet: inlett\n  vent: vent", "inlet: inlett",
     "unknown valve 'inlett'"),
    ("expansion: {small: small, large: large}", "expansion: {small: small, large: huge}",
     "expansion: {small", "unknown valve 'huge'"),
    ("  - [inlet, vent]", "  - [inlet, exhaust]", "[inlet, exhaust]", "unknown valve 'exhaust'"),
    ("  unit: kPa\n", "  unit: furlong\n", "unit: furlong", "not a pressure unit"),
    ("large: {channel: 4", "large: {channel: 3", "  valves:", "both on relay 3"),
    ("kind: ascii_gauge", "kind: ascii_gauje", "pressure:", "kind must be"),
    # found by a sweep: these passed, and an expansion volume on the inlet valve opened the inlet in the
    # safe state and during the vented zero (a run filled its cell to 1.4 bar there, no interlock tripped)
    ("sample_period: 0.1 s", "sample_period: 1 us", "sample_period:", "is shorter than 0.01 s"),
    ("cell: 12.0 cm^3", "cell: -12.0 cm^3", "cell:", "chambers.cell: a chamber volume must be positive"),
    ("    large: 22.0 cm^3", "    large: 22.0 m^3", "large: 22.0 m^3",
     "chambers.expansion.large: 2.2e+07 cm^3 is more than 100 litres"),
    ("expansion: {small: small, large: large}", "expansion: {small: inlet, large: large}", "valve_roles:",
     "expansion.small: valve 'inlet' is already the inlet valve"),
    ("expansion: {small: small, large: large}", "expansion: {small: vent, large: large}", "valve_roles:",
     "expansion.small: valve 'vent' is already the vent valve"),
    ("expansion: {small: small, large: large}", "expansion: {small: small, large: small}", "valve_roles:",
     "expansion.large: valve 'small' is already the expansion.small valve"),
])
def test_config_errors_point_at_the_line(tmp_path, old, new, needle, message):
    p = write_variant(tmp_path, old, new)
    with pytest.raises(ConfigError) as info:
        load_instrument_config(p)
    problems = info.value.problems
    assert any(message in pr.message for pr in problems), problems
    hit = next(pr for pr in problems if message in pr.message)
    assert hit.file == str(p)
    assert hit.line == line_of(p, needle), (hit, needle)
    assert hit.col >= 1


def test_transducer_range_below_relief_warns(tmp_path, caplog):
    p = write_variant(tmp_path, "max: 400 kPa", "max: 200 kPa")
    with caplog.at_level(logging.WARNING):
        load_instrument_config(p)
    assert f"{p}:{line_of(p, 'relief_setting')}:" in caplog.text
    assert "below the relief setting" in caplog.text


def test_normally_open_inlet_warns(tmp_path, caplog):
    p = write_variant(tmp_path, "inlet: {channel: 1, normally: closed}",
                      "inlet: {channel: 1, normally: open}")
    with caplog.at_level(logging.WARNING):
        load_instrument_config(p)
    assert "inlet is normally open" in caplog.text


def test_relay_only_config_requires_layout(tmp_path):
    data = yaml.safe_load(USB.read_text())
    del data["limits"]
    p = tmp_path / "nolimits.yaml"
    p.write_text(yaml.safe_dump(data))
    with pytest.raises(ConfigError, match="missing key 'limits'"):
        load_instrument_config(p)


# -- building against fake devices -------------------------------------------------------------

class CellGauge:
    """Tiny in-test physics: the cell pressure climbs while the inlet is open, drops while venting."""

    name = "cell"

    def __init__(self, bank: MemoryValveBank) -> None:
        self.bank = bank
        self.p = 0.0
        self.validity = Validity.VALID

    def read(self) -> Reading:
        s = self.bank.commanded()
        if s["inlet"] and not s["vent"]:
            self.p += 20e3
        elif s["vent"]:
            self.p = 0.0
        if self.validity is not Validity.VALID:
            return Reading.invalid("Pa", 0.0, self.validity)
        return Reading(self.p, "Pa", 0.0)

    def close(self) -> None:
        return None


@pytest.fixture
def bench(tmp_path):
    """The USB example with its ports pointed at fake devices on pty pairs."""
    bank = MemoryValveBank(("inlet", "vent", "small", "large"), {"vent": True})
    cfg0 = load_instrument_config(USB)
    from pycnoctl.drivers.relay_ascii import Channel

    channels = {n: Channel(v.channel, v.normally == "open") for n, v in cfg0.valves.valves.items()}
    gauge = CellGauge(bank)
    relay_dev = FakeDevice(RelayFirmware.for_board(bank, channels), stable_name="usb-relay8-ascii-if00")
    gauge_dev = FakeDevice(GaugeFirmware(gauge, unit="kPa"), stable_name="usb-gauge-ascii-if00")
    text = (USB.read_text().replace("/dev/serial/by-id/usb-relay8-ascii-if00", relay_dev.url)
            .replace("/dev/serial/by-id/usb-gauge-ascii-if00", gauge_dev.url))
    p = tmp_path / "bench.yaml"
    p.write_text(text)
    inst = build_instrument(load_instrument_config(p))
    yield inst, bank, gauge, relay_dev, gauge_dev
    inst.close()
    relay_dev.close()
    gauge_dev.close()


def test_build_wraps_valves_and_fill_raises_pressure(bench):
    inst, bank, _gauge, _relay_dev, _ = bench
    assert isinstance(inst.valves, GuardedValveBank)
    assert inst.roles.safe_state() == {"inlet": False, "vent": True, "small": True, "large": True}
    assert inst.safe_state()
    assert bank.commanded() == {"inlet": False, "vent": True, "small": True, "large": True}
    inst.valves.set_valves({"vent": False, "small": False, "large": False})
    inst.valves.set_valves({"inlet": True})  # through the real serial driver and the fake board
    first = inst.pressure.read()
    second = inst.pressure.read()
    assert first.valid and second.value > first.value > 0


def test_forbidden_combination_sends_no_byte_at_instrument_level(bench):
    inst, bank, _, relay_dev, _ = bench
    inst.safe_state()
    before = len(relay_dev.received)
    with pytest.raises(ForbiddenValveState):
        inst.valves.set_valves({"inlet": True})  # vent is open
    assert len(relay_dev.received) == before
    assert bank.commanded()["inlet"] is False


def test_usb_pulled_mid_fill_then_operator_reset(bench):
    inst, bank, _gauge, relay_dev, gauge_dev = bench
    inst.valves.set_valves({"vent": False, "small": False, "large": False})
    inst.valves.set_valves({"inlet": True})
    assert inst.pressure.read().valid
    gauge_dev.unplug()  # the gauge's cable comes out mid-fill
    assert inst.pressure.read().validity is Validity.DISCONNECTED
    assert inst.safe_state()  # the relay board still answers: the fill is stopped and vented
    assert bank.commanded() == {"inlet": False, "vent": True, "small": True, "large": True}
    relay_dev.unplug()  # now the relay board too
    assert inst.safe_state() is False  # not confirmed, reported, no exception
    relay_dev.replug()
    gauge_dev.replug()
    result = reconnect_instrument(inst)
    assert result == {"valves": None, "pressure": None, "safe_state": None}
    assert inst.pressure.read().valid


def test_an_ambient_pressure_that_no_lab_has_is_refused(tmp_path):
    # ambient_nominal refers a gauge transducer's readings to absolute where no barometer reads the lab:
    # '1013 bar' (meant hPa) would shift every absolute pressure a thousandfold (a lab's air pressure lies
    # between 30 and 120 kPa: common practice)
    text = USB.read_text()
    assert "ambient_nominal" not in text
    path = tmp_path / "ambient.yaml"
    path.write_text(text + "ambient_nominal: 1013 bar\n")
    with pytest.raises(ConfigError) as exc:
        load_instrument_config(path)
    assert any("ambient_nominal" in str(p) and "between 30 and 120 kPa" in str(p) for p in exc.value.problems)
    path.write_text(text + "ambient_nominal: 1013 hPa\n")
    assert load_instrument_config(path).ambient_nominal == pytest.approx(101300.0)


# -- the sample period against the stale-reading limit ---------------------------------------------

SIMULATED = Path(str(EXAMPLES / "simulated.yaml"))


def _refused(path: Path) -> list:
    with pytest.raises(ConfigError) as info:
        load_instrument_config(path)
    return info.value.problems


def test_a_sample_period_over_the_stale_limit_is_refused_at_its_line(tmp_path):
    """The hardware example read every 2 s under its default 1 s stale-reading limit: every tick a stale trip."""
    p = write_variant(tmp_path, "sample_period: 0.1 s", "sample_period: 2 s")
    [problem] = _refused(p)
    assert (problem.line, problem.col) == (line_of(p, "sample_period:"), 1)
    assert problem.message.startswith("sample_period 2 s is not shorter than the stale-reading limit, "
                                      "limits.stale_after 1 s (its default): ")


def test_a_stale_limit_given_with_the_period_names_both_values(tmp_path):
    p = write_variant(tmp_path, "sample_period: 0.1 s", "sample_period: 0.5 s")
    limit = "  max_rise_rate: 60 kPa/s\n"
    p.write_text(p.read_text().replace(limit, limit + "  stale_after: 0.4 s\n"))
    [problem] = _refused(p)
    assert problem.line == line_of(p, "sample_period:")  # both given: the period is blamed, the limit named
    assert problem.message.startswith("sample_period 0.5 s is not shorter than the stale-reading limit, "
                                      "limits.stale_after 0.4 s: ")
    p.write_text(p.read_text().replace("stale_after: 0.4 s", "stale_after: 0.6 s"))
    assert load_instrument_config(p).limits.stale_after == pytest.approx(0.6)


def test_a_simulated_instrument_is_held_to_its_simulator_configs_stale_limit(tmp_path):
    """With simulated valves and no limits of its own the instrument runs under the simulator config's
    limits, at this file's sample period: the same hole, closed with the simulator config named."""
    p = tmp_path / "sim-instrument.yaml"
    p.write_text(SIMULATED.read_text().replace("sample_period: 0.1 s", "sample_period: 2 s"))
    [problem] = _refused(p)
    assert (problem.line, problem.col) == (line_of(p, "sample_period:"), 1)
    assert "sample_period 2 s is not shorter than the stale-reading limit, limits.stale_after 1 s (the default " \
           "of the simulator config " in problem.message
    # a simulator config whose own limit is longer lets the same period load
    sim = tmp_path / "slow-sim.yaml"
    clean = Path(str(files("pycnoctl.sim") / "configs" / "clean.yaml")).read_text()
    sim.write_text(clean.replace("sample_period: 0.1 s", "sample_period: 2 s\nlimits: {stale_after: 5 s}"))
    assert load_sim_config(sim).instrument_limits().stale_after == 5.0  # it loads: the check did read it
    p.write_text(p.read_text().replace("valves: {kind: sim}", "valves: {kind: sim, config: slow-sim.yaml}")
                 .replace("pressure: {kind: sim}", "pressure: {kind: sim, config: slow-sim.yaml}")
                 .replace("thermometer: {kind: sim}", "thermometer: {kind: sim, config: slow-sim.yaml}")
                 .replace("barometer: {kind: sim}", "barometer: {kind: sim, config: slow-sim.yaml}"))
    assert load_instrument_config(p).sample_period == 2.0


def test_a_chamber_of_exactly_the_largest_volume_loads(tmp_path):
    # '100 L' was refused as "more than 100 litres": the unit conversion rounds it a hair above 0.1 m^3
    cfg = load_instrument_config(write_variant(tmp_path, "    large: 22.0 cm^3", "    large: 100 L"))
    assert cfg.chambers.expansion["large"] == pytest.approx(0.1)
