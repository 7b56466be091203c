"""Simulator config: shipped files load; bad files give file:line:col problems."""

from __future__ import annotations

from pathlib import Path

import pytest

from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.sim.config import load_sim_config, shipped_configs


def test_shipped_configs_load():
    names = set(shipped_configs())
    assert {"clean", "noisy", "leaky", "regulator_failure"} <= names
    for path in shipped_configs().values():
        cfg = load_sim_config(path)
        assert cfg.volumes and cfg.valves


def test_default_is_clean_and_in_si():
    cfg = load_sim_config(None)
    assert cfg.volumes["cell"].volume == pytest.approx(12e-6)  # '12 cm^3'
    assert cfg.lab.temperature == pytest.approx(295.15)  # '22 degC'
    assert cfg.supply.set_pressure == pytest.approx(1.4e5)  # '1.4 bar'
    assert cfg.valves["inlet"].diameter == pytest.approx(0.05e-3)  # '0.05 mm' metering restrictor


def _problems(tmp_path, text):
    p = tmp_path / "bad.yaml"
    p.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as ei:
        load_sim_config(p)
    return ei.value.problems


BASE = """\
gas: helium
volumes:
  cell: {volume: 12 cm^3}
  small: {volume: 8 cm^3}
valves:
  inlet: {role: inlet, between: [supply, cell]}
  vent: {role: vent, between: [cell, ambient]}
  exp: {role: expansion, between: [cell, small]}
"""


def test_base_is_valid(tmp_path):
    p = tmp_path / "ok.yaml"
    p.write_text(BASE, encoding="utf-8")
    assert load_sim_config(p).expansion_volumes() == {"exp": "small"}


def test_unknown_key_located(tmp_path):
    probs = _problems(tmp_path, BASE + "colour: blue\n")
    assert [(p.line, p.col) for p in probs] == [(9, 1)]
    assert "unknown key 'colour'" in probs[0].message


def test_wrong_unit_located(tmp_path):
    probs = _problems(tmp_path, BASE.replace("small: {volume: 8 cm^3}", "small: {volume: 8 bar}"))
    assert len(probs) == 1 and probs[0].line == 4
    assert "volume" in probs[0].message


def test_negative_volume_located(tmp_path):
    probs = _problems(tmp_path, BASE.replace("cell: {volume: 12 cm^3}", "cell: {volume: -12 cm^3}"))
    assert len(probs) == 1 and probs[0].line == 3
    assert "positive" in probs[0].message


def test_unknown_node_located(tmp_path):
    probs = _problems(tmp_path, BASE.replace("between: [cell, small]", "between: [cell, smal]"))
    lines = {p.line for p in probs}
    assert 8 in lines
    assert any("unknown node 'smal'" in p.message for p in probs)
    assert str(probs[0]).startswith(str(tmp_path / "bad.yaml") + ":8:")


def test_fault_needs_its_fields(tmp_path):
    probs = _problems(tmp_path, BASE + "faults:\n  - {kind: valve_leak, valve: exp, at: 10 s}\n")
    assert probs[0].line == 10 and "conductance" in probs[0].message


def test_sample_must_fit_the_cell(tmp_path):
    probs = _problems(tmp_path, BASE + "sample: {solid_volume: 13 cm^3}\n")
    assert probs[0].line == 9 and "smaller than the cell" in probs[0].message


@pytest.mark.parametrize(("line", "new"), [("pressure: 1013.25 hPa", "pressure: 1013.25"),
                                          ("temperature: 22 degC", "temperature: 295.15")])
def test_a_lab_pressure_or_temperature_in_the_wrong_unit_is_refused_at_its_line(tmp_path, line, new):
    # a bare 1013.25 reads as bar and 295.15 as degC: the simulated lab would be at 1000 atmospheres or
    # hotter than boiling water, and every result computed against it (a lab's air pressure 30-120 kPa
    # and temperature -40 to 80 degC: common practice)
    lines = Path(shipped_configs()["clean"]).read_text().splitlines()
    at = next(i for i, x in enumerate(lines) if x.strip() == line)
    lines[at] = lines[at].replace(line, new)
    path = tmp_path / "lab.yaml"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(ConfigError) as exc:
        load_sim_config(path)
    [problem] = exc.value.problems
    assert str(problem).startswith(f"{path}:{at + 1}:") and "give the unit" in str(problem)


def test_two_expansion_valves_into_one_volume_are_refused(tmp_path):
    # found by a sweep: the second valve hid a volume, both opened at every expansion, and a run measured
    # -23 million cm3 with exit 0
    [p] = _problems(tmp_path, BASE + "  exp2: {role: expansion, between: [small, cell]}\n")
    assert p.line == 9 and "expansion valves 'exp' and 'exp2' both open into 'small'" in p.message


# -- the transducer's sample period against the stale-reading limit ---------------------------------

STALE_WORDS = "is not shorter than the stale-reading limit, limits.stale_after"


def test_a_sample_period_longer_than_the_stale_limit_is_refused_naming_both(tmp_path):
    """The stale interlock trips once no valid sample has come for longer than stale_after: a transducer
    read every 2 s under the default 1 s faulted with a stale-reading trip at the first tick."""
    [p] = _problems(tmp_path, BASE + "sample_period: 2 s\n")
    assert (p.line, p.col) == (9, 1)
    assert p.message == ("sample_period 2 s is not shorter than the stale-reading limit, limits.stale_after 1 s "
                         "(its default): the stale interlock trips when no valid pressure sample has come for "
                         "longer than 1 s, so every sample would trip it (the instrument faults at its first "
                         "tick); make sample_period shorter, or limits.stale_after longer (at most 10 s)")


@pytest.mark.parametrize("period", ["1 us", "5 ms"])
def test_a_sample_period_no_transducer_answers_in_is_refused(tmp_path, period):
    # found by a sweep: 1 us passed the loaders, and check's dry run at it ran for minutes without an end
    [p] = _problems(tmp_path, BASE + f"sample_period: {period}\n")
    assert (p.line, p.col) == (9, 1) and "is shorter than 0.01 s" in p.message


def test_an_equal_sample_period_is_refused_too(tmp_path):
    # no margin: a sample late by any amount is a gap over the limit
    [p] = _problems(tmp_path, BASE + "sample_period: 0.5 s\nlimits: {stale_after: 0.5 s}\n")
    assert p.line == 9 and "sample_period 0.5 s" in p.message and "limits.stale_after 0.5 s:" in p.message
    assert "any sample that comes late would trip it" in p.message


def test_a_stale_limit_under_the_default_period_is_blamed_at_the_limit(tmp_path):
    [p] = _problems(tmp_path, BASE + "limits:\n  stale_after: 50 ms\n")  # sample_period: its default 0.1 s
    assert (p.line, p.col) == (10, 3) and p.message.startswith("sample_period 0.1 s " + STALE_WORDS + " 0.05 s:")


def test_a_sample_period_under_the_stale_limit_loads(tmp_path):
    p = tmp_path / "ok.yaml"
    p.write_text(BASE + "sample_period: 0.9 s\n", encoding="utf-8")
    assert load_sim_config(p).sample_period == pytest.approx(0.9)
    p.write_text(BASE + "sample_period: 2 s\nlimits: {stale_after: 5 s}\n", encoding="utf-8")
    assert load_sim_config(p).instrument_limits().stale_after == 5.0


def test_a_pressure_reading_slower_than_the_frozen_limit_is_refused_at_its_line(tmp_path):
    # a reading that changes only every 10 s is bit-identical for 10 s, which the frozen-reading
    # interlock (5 s by default) takes for a dead transducer: the run tripped 5 s into the purge
    line = "pressure:    {node: cell, kind: gauge, full_scale: 3.5 bar, update_rate: 100 Hz}"
    text = Path(shipped_configs()["clean"]).read_text()
    assert line in text
    for rate, refused in (("0.1 Hz", True), ("0.2 Hz", True), ("0.5 Hz", False)):
        path = tmp_path / "slow.yaml"
        path.write_text(text.replace(line, line.replace("100 Hz", rate)))
        at = 1 + path.read_text().splitlines().index("  " + line.replace("100 Hz", rate))
        if not refused:
            load_sim_config(path)
            continue
        with pytest.raises(ConfigError) as exc:
            load_sim_config(path)
        [problem] = exc.value.problems
        assert str(problem).startswith(f"{path}:{at}:") and "frozen_after" in str(problem)


def test_a_regulator_set_above_the_relief_valve_is_refused_at_its_line(tmp_path):
    # found by a sweep: a bare 140 (meant as 1.40 bar?) was read as 140 bar gauge, and the run faulted on
    # the rise-rate interlock without naming the file's line. A failing regulator is the
    # regulator_failure fault's to simulate, not its setting's
    text = Path(shipped_configs()["leaky"]).read_text()
    assert "supply: {set_pressure: 1.4 bar" in text
    path = tmp_path / "sup.yaml"
    path.write_text(text.replace("supply: {set_pressure: 1.4 bar", "supply: {set_pressure: 140"))
    with pytest.raises(ConfigError) as exc:
        load_sim_config(path)
    [problem] = exc.value.problems
    at = 1 + next(i for i, x in enumerate(path.read_text().splitlines()) if x.startswith("supply:"))
    assert str(problem).startswith(f"{path}:{at}:") and "relief valve" in str(problem)


@pytest.mark.parametrize("where", ["cell: {volume: 12 m^3}", "small: {volume: 8 m^3}"])
def test_a_chamber_in_cubic_metres_is_refused_at_its_line_as_an_instrument_config_refuses_it(tmp_path, where):
    # found by a sweep: a simulator's own volumes had no upper bound ('12 m^3' for '12 cm^3' loaded); the
    # instrument config refuses a chamber over 100 litres, and so does this one now
    name = where.split(":")[0]
    probs = _problems(tmp_path, BASE.replace(f"{name}: {{volume: {'12' if name == 'cell' else '8'} cm^3}}", where))
    [problem] = probs
    assert problem.line == (3 if name == "cell" else 4) and "more than 100 litres" in problem.message


def test_a_specimen_in_cubic_metres_is_refused_at_its_line(tmp_path):
    probs = _problems(tmp_path, BASE + "sample: {solid_volume: 5 cm^3, pore_volume: 2 m^3}\n")
    assert probs[0].line == 9 and "more than 100 litres" in probs[0].message


def test_exactly_100_litres_loads_in_a_simulator_config(tmp_path):
    p = tmp_path / "big.yaml"
    p.write_text(BASE.replace("small: {volume: 8 cm^3}", "small: {volume: 100 L}"), encoding="utf-8")
    assert load_sim_config(p).volumes["small"].volume == pytest.approx(0.1)


def test_gauge_pressures_take_the_trades_tags_and_refuse_an_absolute_one(tmp_path):
    # found by a sweep: '1.4 barg' for the regulator was an unknown unit here while the instrument config took it
    p = tmp_path / "tags.yaml"
    p.write_text(BASE + "supply: {set_pressure: 1.4 barg, cylinder_pressure: 200 PSIG}\n"
                 "relief: {set_pressure: 2.5 bar(g)}\n", encoding="utf-8")
    cfg = load_sim_config(p)
    assert cfg.supply.set_pressure == pytest.approx(1.4e5)
    assert cfg.supply.cylinder_pressure == pytest.approx(200 * 6894.757, rel=1e-6)  # 1 psi: NIST SP 811
    assert cfg.relief is not None and cfg.relief.set_pressure == pytest.approx(2.5e5)
    probs = _problems(tmp_path, BASE + "supply: {set_pressure: 2.4 bara}\n")
    assert probs[0].line == 9 and "tagged absolute" in probs[0].message


def test_a_relief_setting_limit_with_a_gauge_tag_derives_the_maximum_from_it(tmp_path):
    p = tmp_path / "lim.yaml"
    p.write_text(BASE + "limits: {relief_setting: 2 barg}\n", encoding="utf-8")
    limits = load_sim_config(p).instrument_limits()
    assert limits.relief_setting == pytest.approx(2e5) and limits.max_pressure == pytest.approx(1.8e5)


@pytest.mark.parametrize("reseat", ["3 bar", "3.5 barg", "350 kPa"])
def test_a_relief_reseat_not_below_its_set_pressure_is_refused_at_its_line(tmp_path, reseat):
    # found by a sweep: reseat 3.5 bar over a 3 bar set pressure loaded, and the cell peaked at 4.02 bar
    # against the 2.87 bar of the default reseat (the valve stayed shut past its set pressure)
    probs = _problems(tmp_path, BASE + f"relief:\n  set_pressure: 3 bar\n  reseat: {reseat}\n")
    assert [(p.line, p.col) for p in probs] == [(11, 3)]
    assert "relief.reseat" in probs[0].message and "not below" in probs[0].message
    p = tmp_path / "ok.yaml"
    p.write_text(BASE + "relief: {set_pressure: 3 bar, reseat: 2.85 bar}\n", encoding="utf-8")
    relief = load_sim_config(p).relief
    assert relief is not None and relief.reseat == pytest.approx(2.85e5)


@pytest.mark.parametrize("setting", ["3 bara", "3 bananas", "0 bar", "200 bar"])
def test_a_refused_relief_setting_is_the_only_problem(tmp_path, setting):
    # found by a sweep: after the relief setting's own refusal came a second one, "limits.max_pressure:
    # 'None' is not a number with a unit (derived from here ...)", at the relief valve's line
    probs = _problems(tmp_path, BASE + "relief: {set_pressure: 3 bar}\n" + f"limits:\n  relief_setting: {setting}\n")
    assert len(probs) == 1, [p.message for p in probs]
    assert (probs[0].line, probs[0].col) == (11, 3) and probs[0].message.startswith("limits.relief_setting: ")
    # a max_pressure the file gives is still checked on its own
    probs = _problems(tmp_path, BASE + f"limits:\n  relief_setting: {setting}\n  max_pressure: 2 bananas\n")
    assert sorted(p.line for p in probs) == [10, 11]


def test_a_gauge_transducers_range_takes_a_gauge_tag_and_an_absolute_one_its_own(tmp_path):
    # found by a sweep: full_scale '3.5 barg' (as a gauge transducer's label says) was an unknown unit
    p = tmp_path / "fs.yaml"
    p.write_text(BASE + "instruments: {pressure: {full_scale: 3.5 BARG, range_min: -1 bar(g)}}\n", encoding="utf-8")
    pressure = load_sim_config(p).instruments.pressure
    assert pressure.full_scale == pytest.approx(3.5e5) and pressure.range_min == pytest.approx(-1e5)
    p.write_text(BASE + "instruments: {pressure: {kind: absolute, full_scale: 4.5 bara}}\n", encoding="utf-8")
    assert load_sim_config(p).instruments.pressure.full_scale == pytest.approx(4.5e5)
    # the other scale's tag would be read on this one: refused at its line
    probs = _problems(tmp_path, BASE + "instruments: {pressure: {full_scale: 3.5 bara}}\n")
    assert probs[0].line == 9 and "tagged absolute, but this pressure is gauge" in probs[0].message
    probs = _problems(tmp_path, BASE + "instruments: {pressure: {kind: absolute, full_scale: 4.5 barg}}\n")
    assert probs[0].line == 9 and "tagged gauge, but this pressure is absolute" in probs[0].message
    probs = _problems(tmp_path, BASE + "instruments: {pressure: {full_scale: 0 barg}}\n")
    assert "must be positive" in probs[0].message


def test_a_pressure_step_takes_a_gauge_tag_and_refuses_an_absolute_one(tmp_path):
    # found by a sweep: an ambient step of '5 BARG' was an unknown unit. A step is a change, the same on
    # either scale, so a gauge tag changes nothing; an absolute tag names a level, which the key is not.
    p = tmp_path / "step.yaml"
    p.write_text(BASE + "faults: [{kind: ambient_step, at: 1 s, pressure_step: 5 MBARG},\n"
                 "         {kind: ambient_step, at: 2 s, pressure_step: -3 mbar(g)}]\n", encoding="utf-8")
    assert [f.pressure_step for f in load_sim_config(p).faults] == [pytest.approx(500.0), pytest.approx(-300.0)]
    probs = _problems(tmp_path, BASE + "faults: [{kind: ambient_step, at: 1 s, pressure_step: 1013 hPa abs}]\n")
    assert probs[0].line == 9 and "not the level it steps to" in probs[0].message


def test_a_fault_key_its_kind_does_not_use_is_refused_at_its_line(tmp_path):
    # found by a sweep: {kind: transducer, mode: nan, device: thermometer} loaded and made the pressure
    # transducer read NaN: the device key belongs to a disconnect
    probs = _problems(tmp_path, BASE + "faults:\n  - {kind: transducer, mode: nan, device: thermometer, at: 5 s}\n")
    assert any(p.line == 10 and "a transducer fault takes no 'device' (it acts on the pressure transducer)"
               in p.message for p in probs), probs
