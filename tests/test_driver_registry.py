"""The driver registry: shipped kinds are found without a list, the loader takes its kinds from it,
and the gas-path types load from a file with positions while code builds them from SI floats."""

from __future__ import annotations

from importlib.resources import files
from pathlib import Path
from typing import get_args

import pytest

from pycnoctl.controller.domain.gaspath import ChamberCalibration, Chambers, ValveRoles
from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.drivers import registry
from pycnoctl.drivers.config import load_instrument_config
from pycnoctl.drivers.fields import Strict

USB = Path(str(files("pycnoctl.drivers") / "instruments" / "usb-relay-serial-gauge.yaml"))


def variant(tmp_path: Path, old: str, new: str) -> Path:
    text = USB.read_text()
    assert old in text
    p = tmp_path / "lab.yaml"
    p.write_text(text.replace(old, new, 1))
    return p


def line_of(path: Path, needle: str) -> int:
    return next(i for i, line in enumerate(path.read_text().splitlines(), 1) if needle in line)


def test_shipped_kinds_are_discovered_by_what_they_serve():
    # subsets: a driver added later is its own file and test, and does not edit this one
    assert {"ascii_gauge", "modbus", "sim", "visa_meter"} <= set(registry.kinds(registry.PRESSURE))
    assert {"ascii_relay", "sim"} <= set(registry.kinds(registry.VALVES))
    assert {"ascii_thermometer", "sim"} <= set(registry.kinds(registry.TEMPERATURE))
    assert "ascii_relay" not in registry.kinds(registry.PRESSURE)


def test_each_kind_names_itself_in_its_model():
    for name, kind in registry.kinds().items():
        assert get_args(kind.model.model_fields["kind"].annotation) == (name,), kind.model


def test_unknown_kind_lists_the_registered_kinds_at_its_position(tmp_path):
    p = variant(tmp_path, "kind: ascii_gauge", "kind: ascii_gauje")
    with pytest.raises(ConfigError) as info:
        load_instrument_config(p)
    (problem,) = info.value.problems
    assert problem.line == line_of(p, "pressure:")
    assert f"kind must be one of {', '.join(registry.kinds(registry.PRESSURE))} " in problem.message
    assert all(name in problem.message for name in ("ascii_gauge", "modbus", "sim", "visa_meter"))


def test_a_kind_cannot_be_taken_by_a_second_driver():
    class Other(Strict):
        kind: str

    with pytest.raises(ValueError, match="registered twice"):
        registry.register("modbus", registry.PRESSURE, Other, lambda dev, ctx: None)
    assert registry.kinds()["modbus"].model is not Other


def test_the_config_loads_the_one_gas_path_types():
    cfg = load_instrument_config(USB)
    assert isinstance(cfg.valve_roles, ValveRoles) and isinstance(cfg.chambers, Chambers)
    assert cfg.valve_roles.safe_state() == {"inlet": False, "vent": True, "small": True, "large": True}
    cal = cfg.chambers.for_expansion("small")
    assert (cal.vc, cal.vr) == pytest.approx((12.0e-6, 8.5e-6))  # 1 cm^3 = 1e-6 m^3


@pytest.mark.parametrize(("old", "new", "needle", "message"), [
    ("cell: 12.0 cm^3", "cell: 12.0", "cell:", "give a unit"),
    ("cell: 12.0 cm^3", "cell: 12.0 cm^3\n  calibrated: {}", "calibrated:", "calibration records"),
    ("  vent: vent\n", "  vent: vent\n  exhaust: vent\n", "exhaust:", "unknown key"),
])
def test_gas_path_mistakes_point_at_the_line(tmp_path, old, new, needle, message):
    p = variant(tmp_path, old, new)
    with pytest.raises(ConfigError) as info:
        load_instrument_config(p)
    assert any(message in pr.message and pr.line == line_of(p, needle) for pr in info.value.problems), \
        info.value.problems


def test_code_builds_chambers_from_si_floats():
    ch = Chambers(cell=12.0e-6, expansion={"small": 8.5e-6})
    cal = ChamberCalibration(11.9e-6, 8.4e-6, record_id="c1")
    ch2 = ch.model_copy(update={"calibrated": {"small": cal}})
    assert ch.for_expansion("small").vc == 12.0e-6
    assert ch2.for_expansion("small") is cal
