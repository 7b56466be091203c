"""In-process simulated drivers: protocols, validities, the derived Instrument."""

from __future__ import annotations

import math

import pytest

from pycnoctl.controller.domain.devices import (
    Barometer,
    DeviceDisconnected,
    DeviceError,
    ForbiddenValveState,
    PressureSensor,
    Thermometer,
    Validity,
    ValveBank,
)
from pycnoctl.drivers.instrument import Instrument
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import shipped_configs
from pycnoctl.sim.testing import make


def test_instrument_from_clean_config():
    ins = build_sim_instrument()
    assert isinstance(ins, Instrument)
    assert isinstance(ins.valves, ValveBank) and isinstance(ins.pressure, PressureSensor)
    assert isinstance(ins.thermometer, Thermometer) and isinstance(ins.barometer, Barometer)
    assert ins.roles.inlet == "inlet" and ins.roles.vent == "vent"
    assert ins.roles.expansion == {"small": "exp_small", "large": "exp_large"}
    assert ins.chambers.cell == pytest.approx(12e-6)
    assert ins.chambers.expansion == {"small": pytest.approx(8e-6), "large": pytest.approx(20e-6)}
    assert ins.limits.relief_setting == pytest.approx(3e5)
    assert ins.limits.max_pressure < ins.limits.relief_setting
    assert ins.sample_period == pytest.approx(0.1)
    assert ins.extras["sim"].config.name == "clean demo pycnometer"


def test_nominal_and_limits_sections_override():
    cfg = make(nominal={"cell": "12.1 cm^3", "expansion": {"small": "7.9 cm^3"}},
               limits={"max_pressure": "2 bar", "stale_after": "2 s"})
    ins = build_sim_instrument(cfg)
    assert ins.chambers.cell == pytest.approx(12.1e-6)
    assert ins.chambers.expansion["small"] == pytest.approx(7.9e-6)
    assert ins.chambers.expansion["large"] == pytest.approx(20e-6)
    assert ins.limits.max_pressure == pytest.approx(2e5) and ins.limits.stale_after == 2.0


def test_cell_side_dead_volume_counts_in_chamber():
    ins = build_sim_instrument(shipped_configs()["noisy"])
    assert ins.chambers.cell == pytest.approx(12e-6)  # 10.5 cm^3 cell + 1.5 cm^3 manifold behind a frit


def test_valves_and_read_back_show_commanded_not_stuck_truth():
    cfg = make(faults=[{"kind": "valve_stuck", "valve": "vent", "open": True, "at": "0 s"}])
    ins = build_sim_instrument(cfg)
    ins.valves.set_valves({"vent": False})
    assert ins.valves.commanded()["vent"] is False
    assert ins.valves.read_back()["vent"] is False  # a relay board reports its coil
    assert ins.extras["sim"].actual_valves()["vent"] is True  # the seat is stuck open
    with pytest.raises(DeviceError):
        ins.valves.inner.set_valves({"nonexistent": True})  # the board itself
    with pytest.raises(ForbiddenValveState):
        ins.valves.set_valves({"nonexistent": True})  # the guard refuses it before the board sees it


def test_fill_reading_and_safe_state():
    ins = build_sim_instrument(make())  # the fast-inlet test bench
    ins.valves.set_valves({"vent": False, "exp_small": False, "exp_large": False, "inlet": True})
    ins.clock.sleep(3.0)
    r = ins.pressure.read()
    assert r.valid and r.unit == "Pa" and r.t == pytest.approx(3.0)
    assert r.value == pytest.approx(1.4e5, rel=2e-3)
    assert ins.safe_state()
    ins.clock.sleep(30.0)
    assert abs(ins.pressure.read().value) < 10.0
    assert ins.thermometer.read().value == pytest.approx(295.15)
    assert ins.barometer.read().value == pytest.approx(101325.0)


@pytest.mark.parametrize(("mode", "validity"), [
    ("silent", Validity.TIMEOUT), ("garbled", Validity.GARBLED), ("nan", Validity.NAN),
])
def test_transducer_fault_validities(mode, validity):
    ins = build_sim_instrument(make(faults=[{"kind": "transducer", "mode": mode, "at": "1 s"}]))
    assert ins.pressure.read().valid
    ins.clock.sleep(1.0)
    r = ins.pressure.read()
    assert r.validity is validity and math.isnan(r.value)


def test_frozen_transducer_reads_valid():
    ins = build_sim_instrument(make(faults=[{"kind": "transducer", "mode": "frozen", "at": "1 s"}]))
    ins.clock.sleep(0.5)
    v0 = ins.pressure.read().value
    ins.clock.sleep(0.5)
    ins.valves.set_valves({"vent": False, "exp_small": False, "exp_large": False, "inlet": True})
    values = []
    for _ in range(20):
        ins.clock.sleep(0.1)
        r = ins.pressure.read()
        assert r.valid
        values.append(r.value)
    assert set(values) == {v0}  # the engine must catch this itself


def test_out_of_range_reading():
    cfg = make({"instruments": {"pressure": {"full_scale": "1 bar"}}, "relief": None})
    ins = build_sim_instrument(cfg)
    ins.valves.set_valves({"vent": False, "exp_small": False, "exp_large": False, "inlet": True})
    ins.clock.sleep(3.0)
    assert ins.pressure.read().validity is Validity.OUT_OF_RANGE


def test_valve_board_disconnect_raises():
    ins = build_sim_instrument(make(faults=[{"kind": "disconnect", "device": "valves", "at": "1 s"}]))
    ins.valves.set_valves({"inlet": False, "vent": False})
    ins.clock.sleep(1.5)
    with pytest.raises(DeviceDisconnected):
        ins.valves.set_valves({"inlet": True})
    with pytest.raises(DeviceDisconnected):
        ins.valves.read_back()
    assert not ins.safe_state()  # Instrument reports the safe state as not confirmed


def test_sensor_disconnect_validity():
    ins = build_sim_instrument(make(faults=[
        {"kind": "disconnect", "device": "pressure", "at": "1 s"},
        {"kind": "disconnect", "device": "barometer", "at": "1 s"},
    ]))
    ins.clock.sleep(1.0)
    assert ins.pressure.read().validity is Validity.DISCONNECTED
    assert ins.barometer.read().validity is Validity.DISCONNECTED
    assert ins.thermometer.read().valid


def test_every_shipped_config_builds_and_reads():
    for path in shipped_configs().values():
        ins = build_sim_instrument(path)
        ins.clock.sleep(0.2)
        assert ins.pressure.read().valid
        ins.close()
