"""Interlock limits: one type, loaded from the instrument and the simulator config alike, and no value
that would switch an interlock off gets past the loader (every refusal with file:line:col)."""

from __future__ import annotations

from pathlib import Path

import pytest

from pycnoctl.controller.domain.gaspath import Limits
from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.drivers.config import load_instrument_config
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import load_sim_config
from tests.test_instrument_config import line_of, write_variant

ADDED = "  max_rise_rate: 60 kPa/s\n"  # the last line of the shipped example's limits section

# (line added to the limits section, or a replacement, and the words of the refusal)
BAD = [
    ("  stale_after: 1e9 s\n", "at most 10 s"),
    ("  frozen_after: 1e9 s\n", "at most 60 s"),
    ("  closed_inlet_window: 0 s\n", "must be above 0"),
    ("  vent_timeout: 1e6 s\n", "at most 600 s"),
    ("  closed_inlet_rise: 1e9 Pa\n", "at most 1e+07 Pa"),
    ("  closed_inlet_rise: 2.9 bar\n", "below max_pressure"),
    ("  invalid_trip_pressure: -1 kPa\n", "must be above 0"),
    ("  vent_baseline_tolerance: 2.9 bar\n", "below max_pressure"),
    # a sweep: 170 kPa under a 180 kPa max_pressure passed, and a cell at 1.6 bar counted as vented
    ("  vent_baseline_tolerance: 170 kPa\n", "at most a tenth of max_pressure"),
    ("  stale_after: forever\n", "not a number with a unit"),
]


@pytest.mark.parametrize(("line", "message"), BAD)
def test_instrument_config_refuses_a_limit_that_disables_its_interlock(tmp_path, line, message):
    p = write_variant(tmp_path, ADDED, ADDED + line)
    _refused_at(p, line.split(":")[0].strip(), message, load_instrument_config)


@pytest.mark.parametrize(("new", "message"), [
    ("max_rise_rate: 1e12 Pa/s", "at most 1e+09 Pa/s"),
    ("max_rise_rate: -60 kPa/s", "must be above 0"),
    ("max_rise_rate: 60000", "give a unit"),
    ("max_pressure: 250 kPa", "below the relief"),
])
def test_instrument_config_refuses_bad_rates_and_pressures(tmp_path, new, message):
    old = "max_rise_rate: 60 kPa/s" if new.startswith("max_rise") else "max_pressure: 180 kPa"
    p = write_variant(tmp_path, old, new)
    _refused_at(p, new.split(":")[0], message, load_instrument_config)


SIM = """\
gas: helium
volumes:
  cell: {volume: 12 cm^3}
  small: {volume: 8 cm^3}
valves:
  inlet: {role: inlet, between: [supply, cell]}
  vent: {role: vent, between: [cell, ambient]}
  exp: {role: expansion, between: [cell, small]}
relief: {set_pressure: 3 bar}
limits:
"""


@pytest.mark.parametrize(("line", "message"), [*BAD,
    ("  max_pressure: 3.5 bar\n", "below the relief"),  # the relief valve's 3 bar is the default setting
    ("  max_rise_rate: 1e12 Pa/s\n", "at most 1e+09 Pa/s"),
    ("  max_pressure: 2\n", "give a unit"),
    ("  stale_afterwards: 2 s\n", "unknown key 'stale_afterwards'"),
    ("  relief_setting: 4 bar\n", "above the simulated relief valve's set pressure"),
])
def test_simulator_config_refuses_the_same_limits(tmp_path, line, message):
    p = tmp_path / "sim.yaml"
    p.write_text(SIM + line, encoding="utf-8")
    _refused_at(p, line.split(":")[0].strip(), message, load_sim_config)


def test_simulator_limits_default_from_its_relief_valve_and_take_overrides(tmp_path):
    p = tmp_path / "sim.yaml"
    p.write_text(SIM + "  frozen_after: 4 s\n", encoding="utf-8")
    lim = build_sim_instrument(load_sim_config(p)).limits
    assert isinstance(lim, Limits)
    assert lim.relief_setting == 3e5 and lim.max_pressure == 0.9 * 3e5  # the documented defaults
    assert lim.frozen_after == 4.0 and lim.vent_timeout == Limits.model_fields["vent_timeout"].default


def test_a_limit_takes_a_gauge_tag_and_refuses_an_absolute_one():
    # found by a sweep: '1.8 barg' was an unknown unit in an instrument config's limits
    assert Limits.model_validate({"max_pressure": "1.8 barg", "relief_setting": "2.5 bar"}).max_pressure == \
        pytest.approx(1.8e5)
    with pytest.raises(ValueError, match="tagged absolute, but this pressure is gauge"):
        Limits.model_validate({"max_pressure": "2.8 bara", "relief_setting": "3.5 bar"})


def test_limits_from_code_are_si_and_bounded_too():
    assert Limits(max_pressure=2e5, relief_setting=3e5).max_pressure == 2e5  # plain floats are SI in code
    with pytest.raises(ValueError, match="below the relief"):
        Limits(max_pressure=3e5, relief_setting=3e5)


def _refused_at(path: Path, key: str, message: str, load) -> None:
    with pytest.raises(ConfigError) as info:
        load(path)
    hits = [pr for pr in info.value.problems if message in pr.message]
    assert hits, info.value.problems
    assert hits[0].file == str(path)
    assert (hits[0].line, hits[0].col) == (line_of(path, key + ":"), 3), hits[0]


def test_simulator_limits_derived_from_an_absurd_relief_point_at_the_relief(tmp_path):
    p = tmp_path / "sim.yaml"
    text = SIM.replace("set_pressure: 3 bar", "set_pressure: 300 bar") + "  frozen_after: 4 s\n"
    p.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as info:
        load_sim_config(p)
    hit = next(pr for pr in info.value.problems if "limits.relief_setting" in pr.message)
    assert "derived from here" in hit.message and hit.line == line_of(p, "relief:")
