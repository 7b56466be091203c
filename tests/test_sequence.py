"""Sequence model: values with units, ranges, cross-field rules, and exact file:line:col of every mistake.

Expected positions are computed from the test text itself (``pos``: 1-based line and column of a
substring), never pasted from a run.
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest
from pydantic import ValidationError

from pycnoctl.controller.domain.yamlio import MAX_BYTES, ConfigError
from pycnoctl.controller.run import sequence as sq

GOOD = """\
format: pycnoctl-sequence/1
name: test-run
description: a sequence written for the tests
kind: measure
gas: helium
purge:
  pulses: 3
  pressure: 1.0 bar
  hold: 2 s
  vent: 3 s
fill:
  target: 1.30 bar
  timeout: 60 s
  overshoot: 0.05 bar
settle:
  window: 10 s
  max_drift: 0.5 Pa/s
  min_time: 5 s
  max_time: 300 s
  extrapolate: false
  on_timeout: fault
settle_filled: {}
settle_expanded:
  window: 20 s
  max_drift: auto
expand:
  volume: auto
  sample_estimate: 5 cm^3
vent:
  time: 5 s
  timeout: 60 s
  baseline_tolerance: 1 kPa
cycles:
  count: 8
  discard: 2
  converge:
    last: 3
    within: 0.05 %
  stop_on_converge: false
sample_defaults:
  mass: null
"""


def pos(text: str, needle: str, nth: int = 0) -> tuple[int, int]:
    """1-based (line, col) of the nth occurrence of needle in text."""
    i = -1
    for _ in range(nth + 1):
        i = text.index(needle, i + 1)
    line = text.count("\n", 0, i) + 1
    col = i - (text.rfind("\n", 0, i) + 1) + 1
    return line, col


def write(tmp_path: Path, text: str | bytes, name: str = "seq.yaml") -> Path:
    p = tmp_path / name
    if isinstance(text, bytes):
        p.write_bytes(text)
    else:
        p.write_text(text, encoding="utf-8")
    return p


def problems(path: Path) -> list[tuple[int, int, str]]:
    with pytest.raises(ConfigError) as info:
        sq.load_sequence(path)
    for p in info.value.problems:
        assert p.file == str(path)
        assert str(p).startswith(f"{path}:{p.line}:{p.col}: ")
    return [(p.line, p.col, p.message) for p in info.value.problems]


def only(path: Path) -> tuple[int, int, str]:
    got = problems(path)
    assert len(got) == 1, got
    return got[0]


def edit(old: str, new: str, text: str = GOOD) -> str:
    assert text.count(old) == 1, old
    return text.replace(old, new)


# ----------------------------------------------------------------------------- a good file


def test_good_file_parses_to_si(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD)
    seq = sq.load_sequence(path)
    # 1 bar = 1e5 Pa exactly (SI brochure, BIPM, table of non-SI units accepted for use)
    assert seq.fill.target == pytest.approx(1.30e5, rel=1e-12)
    assert seq.fill.overshoot == pytest.approx(0.05e5, rel=1e-12)
    assert seq.purge is not None and seq.purge.pressure == pytest.approx(1.0e5, rel=1e-12)
    assert seq.vent.baseline_tolerance == pytest.approx(1.0e3, rel=1e-12)
    # 1 cm^3 = 1e-6 m^3 (SI prefixes)
    assert seq.expand.sample_estimate == pytest.approx(5e-6, rel=1e-12)
    # percent = 1/100 (SI brochure, dimensionless quantities)
    assert seq.cycles.converge is not None and seq.cycles.converge.within == pytest.approx(5e-4, rel=1e-12)
    assert seq.settle.max_drift == pytest.approx(0.5)
    assert seq.settle.max_time == 300.0 and seq.settle.extrapolate is False
    assert seq.gas == "helium" and seq.kind == "measure"


def test_sequence_remembers_path_text_and_doc(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD)
    seq = sq.load_sequence(path)
    assert seq.path == path
    assert seq.raw_text == path.read_bytes().decode("utf-8")
    assert seq.doc is not None and seq.doc.where(("fill", "target")) == pos(GOOD, "target:")


def test_sequence_is_frozen(tmp_path: Path) -> None:
    seq = sq.load_sequence(write(tmp_path, GOOD))
    with pytest.raises(ValidationError):
        seq.fill.target = 3e5  # type: ignore[misc]


def test_other_units_convert(tmp_path: Path) -> None:
    text = edit("  target: 1.30 bar", "  target: 18.0 psi")
    text = edit("  max_time: 300 s", "  max_time: 5 min", text)
    text = edit("  sample_estimate: 5 cm^3", "  sample_estimate: 5 mL", text)
    seq = sq.load_sequence(write(tmp_path, text))
    # psi = 6.894757e3 Pa (NIST SP 811, appendix B.9)
    assert seq.fill.target == pytest.approx(18.0 * 6.894757e3, rel=1e-6)
    assert seq.settle.max_time == 300.0  # 1 min = 60 s
    assert seq.expand.sample_estimate == pytest.approx(5e-6, rel=1e-12)  # 1 mL = 1 cm^3 (SI brochure)


def test_bare_numbers_take_documented_default_units(tmp_path: Path) -> None:
    text = edit("  target: 1.30 bar", "  target: 1.3")
    text = edit("  window: 10 s", "  window: 12", text)
    text = edit("  sample_estimate: 5 cm^3", "  sample_estimate: 5", text)
    text = edit("  max_drift: 0.5 Pa/s", "  max_drift: 0.5", text)
    text = edit("    within: 0.05 %", "    within: 0.0005", text)
    seq = sq.load_sequence(write(tmp_path, text))
    assert seq.fill.target == pytest.approx(1.3e5)  # bar
    assert seq.settle.window == 12.0  # s
    assert seq.expand.sample_estimate == pytest.approx(5e-6)  # cm^3
    assert seq.settle.max_drift == 0.5  # Pa/s
    assert seq.cycles.converge is not None and seq.cycles.converge.within == pytest.approx(5e-4)


def test_settle_overrides_merge_into_effective_settles(tmp_path: Path) -> None:
    seq = sq.load_sequence(write(tmp_path, GOOD))
    assert seq.settle_filled == seq.settle  # empty override: the base settle
    assert seq.settle_expanded.window == 20.0 and seq.settle_expanded.max_drift == "auto"
    # keys not in the override come from settle
    assert seq.settle_expanded.min_time == seq.settle.min_time == 5.0
    assert seq.settle_expanded.max_time == seq.settle.max_time


def test_missing_override_blocks_copy_settle(tmp_path: Path) -> None:
    text = edit("settle_filled: {}\n", "")
    text = edit("settle_expanded:\n  window: 20 s\n  max_drift: auto\n", "", text)
    seq = sq.load_sequence(write(tmp_path, text))
    assert seq.settle_filled == seq.settle_expanded == seq.settle
    assert seq.settle.window == 10.0


def test_defaults_for_optional_sections(tmp_path: Path) -> None:
    text = """\
format: pycnoctl-sequence/1
name: minimal
kind: measure
fill:
  target: 1.2 bar
expand:
  volume: small
cycles:
  count: 4
"""
    seq = sq.load_sequence(write(tmp_path, text))
    # USP <699> / Ph. Eur. 2.9.23: helium unless stated otherwise [M]
    assert seq.gas == "helium"
    assert seq.purge is None and seq.leak_check is None
    assert seq.cycles.discard == 0 and seq.cycles.converge is None
    assert seq.settle.max_drift == "auto" and seq.settle.on_timeout == "fault"


def test_converge_default_matches_usp_consecutive_rule() -> None:
    # USP <699> [M]: repeat until consecutive volumes agree within 0.2 %.  Two values 0.2 % apart lie
    # 0.1 % either side of their mean, so the default 'within' (each of the last k within x of the mean)
    # for two cycles must be 0.1 %.
    c = sq.Converge()
    assert c.last == 2
    v1, v2 = 1.0, 1.0 * (1 + 0.002)
    mean = (v1 + v2) / 2
    assert max(abs(v1 - mean), abs(v2 - mean)) / mean == pytest.approx(c.within, rel=1e-3)


def test_gas_alias_is_canonical(tmp_path: Path) -> None:
    seq = sq.load_sequence(write(tmp_path, edit("gas: helium", "gas: He")))
    assert seq.gas == "helium"


# ----------------------------------------------------------------------------- positions of mistakes


def test_syntax_error_position(tmp_path: Path) -> None:
    text = edit("name: test-run", "name: test: run")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, ": run")
    assert "mapping values" in msg


def test_unclosed_flow_position_is_inside_file(tmp_path: Path) -> None:
    text = edit("settle_filled: {}", "settle_filled: {window: 3 s")
    line, col, msg = only(write(tmp_path, text))
    # inside the open flow mapping 'settle_expanded' reads as a plain scalar; the parser stops at
    # the ':' after it, where it expected ',' or '}'
    first_line, first_col = pos(text, "settle_expanded:")
    assert (line, col) == (first_line, first_col + len("settle_expanded"))
    assert "','" in msg or "'}'" in msg


def test_wrong_type_position(tmp_path: Path) -> None:
    text = edit("  count: 8", "  count: many")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "count: many")
    assert msg.startswith("cycles.count:")


@pytest.mark.parametrize("value", ["3.0", "'3'", "true"])
def test_counts_are_strict_integers(tmp_path: Path, value: str) -> None:
    text = edit("  pulses: 3", f"  pulses: {value}")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "pulses:")
    assert "purge.pulses" in msg


def test_bad_unit_position(tmp_path: Path) -> None:
    text = edit("  target: 1.30 bar", "  target: 1.3 kg")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "target: 1.3 kg")
    assert "not a pressure" in msg and "fill.target" in msg


@pytest.mark.parametrize(
    "value", ["yes", "[1, 2]", "{a: 1}", "null", "1.3 ba", "1.3 bar bar", "1 (", "1 kPa/0"]
)
def test_values_that_are_not_pressures(tmp_path: Path, value: str) -> None:
    text = edit("  target: 1.30 bar", f"  target: {value}")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "target:")
    assert msg.startswith("fill.target:")


def test_unknown_nested_key_position(tmp_path: Path) -> None:
    text = edit("    within: 0.05 %", "    within: 0.05 %\n    witin: 0.1 %")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "witin")
    assert msg == "unknown key 'witin'; did you mean 'within'?"


def test_unknown_top_level_key_position(tmp_path: Path) -> None:
    text = GOOD + "temperature: 20 degC\n"
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "temperature:")
    assert msg == "unknown key 'temperature'"


def test_duplicate_key_position(tmp_path: Path) -> None:
    text = edit("  timeout: 60 s\n  overshoot", "  timeout: 60 s\n  target: 1.4 bar\n  overshoot")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "target:", nth=1)
    assert msg == "duplicate key 'target'"


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ("  pulses: 3", "  pulses: 51", "purge.pulses"),
        ("  pulses: 3", "  pulses: -1", "purge.pulses"),
        ("  count: 8", "  count: 1001", "cycles.count"),
        ("  count: 8", "  count: 0", "cycles.count"),
        ("  window: 10 s", "  window: 0 s", "settle.window"),
        ("  hold: 2 s", "  hold: -2 s", "purge.hold"),
        ("  target: 1.30 bar", "  target: 0 bar", "fill.target"),
        ("  target: 1.30 bar", "  target: -0.2 bar", "fill.target"),
        ("    last: 3", "    last: 1", "cycles.converge.last"),
        ("    within: 0.05 %", "    within: 11 %", "cycles.converge.within"),
        ("    within: 0.05 %", "    within: 0 %", "cycles.converge.within"),
        ("  max_drift: 0.5 Pa/s", "  max_drift: 0 Pa/s", "settle.max_drift"),
        ("  sample_estimate: 5 cm^3", "  sample_estimate: 0 cm^3", "expand.sample_estimate"),
        ("  overshoot: 0.05 bar", "  overshoot: -0.01 bar", "fill.overshoot"),
    ],
)
def test_out_of_range_position(tmp_path: Path, old: str, new: str, key: str) -> None:
    text = edit(old, new)
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, new.strip())
    assert msg.startswith(key + ":")


def test_missing_nested_required_key_points_at_its_section(tmp_path: Path) -> None:
    text = edit("  target: 1.30 bar\n", "")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "fill:")
    assert msg == "missing key 'target'"


def test_missing_top_level_key_points_at_file_start(tmp_path: Path) -> None:
    text = edit("name: test-run\n", "")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == (1, 1)
    assert msg == "missing key 'name'"


def test_discard_not_below_count_position(tmp_path: Path) -> None:
    text = edit("  count: 8\n  discard: 2", "  count: 3\n  discard: 3")
    text = edit("    last: 3", "    last: 2", text)
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "discard:")
    assert msg == "cycles.discard: discard (3) must be less than count (3)"


def test_converge_longer_than_kept_cycles_position(tmp_path: Path) -> None:
    text = edit("    last: 3", "    last: 7")  # count 8 - discard 2 = 6 kept
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "last: 7")
    assert "count - discard = 6" in msg


def test_min_time_above_max_time_position(tmp_path: Path) -> None:
    text = edit("  min_time: 5 s", "  min_time: 400 s")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "min_time: 400")
    assert msg.startswith("settle.min_time:")


def test_override_break_blames_the_override_key(tmp_path: Path) -> None:
    text = edit("settle_filled: {}", "settle_filled: {max_time: 8 s}")
    line, col, msg = only(write(tmp_path, text))  # window 10 s from settle > max_time 8 s
    assert (line, col) == pos(text, "max_time: 8 s")
    assert msg.startswith("settle_filled.max_time:") and "after merging" in msg


def test_window_longer_than_max_time(tmp_path: Path) -> None:
    text = edit("  window: 10 s", "  window: 10 min")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "window: 10 min")
    assert "window (600 s) must not exceed max_time (300 s)" in msg


def test_vent_time_above_timeout(tmp_path: Path) -> None:
    text = edit("  time: 5 s", "  time: 2 min")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "time: 2 min")
    assert msg.startswith("vent.time:")


def test_overshoot_not_below_target(tmp_path: Path) -> None:
    text = edit("  overshoot: 0.05 bar", "  overshoot: 1.5 bar")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "overshoot: 1.5")
    assert msg.startswith("fill.overshoot:")


def test_stop_on_converge_needs_converge(tmp_path: Path) -> None:
    text = edit("  converge:\n    last: 3\n    within: 0.05 %\n  stop_on_converge: false",
                "  stop_on_converge: true")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "stop_on_converge:")
    assert "converge block" in msg


def test_auto_volume_needs_sample_estimate(tmp_path: Path) -> None:
    text = edit("  sample_estimate: 5 cm^3\n", "")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "volume: auto")
    assert "sample_estimate" in msg


def test_leak_check_kind_needs_leak_check_section(tmp_path: Path) -> None:
    text = edit("kind: measure", "kind: leak_check")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "kind:")
    assert "leak_check" in msg


def test_purge_kind_needs_a_pulse(tmp_path: Path) -> None:
    text = edit("kind: measure", "kind: purge")
    text = edit("  pulses: 3", "  pulses: 0", text)
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "pulses: 0")
    assert "at least one pulse" in msg


def test_measure_kind_needs_fill_expand_cycles(tmp_path: Path) -> None:
    text = "format: pycnoctl-sequence/1\nname: n\nkind: calibrate\n"
    got = problems(write(tmp_path, text))
    assert [(ln, c) for ln, c, _ in got] == [pos(text, "kind:")] * 3
    assert sorted(m.split("'")[1] for _, _, m in got) == ["cycles", "expand", "fill"]


def test_wrong_format_and_kind_and_gas(tmp_path: Path) -> None:
    text = edit("format: pycnoctl-sequence/1", "format: pycnoctl-sequence/2")
    text = edit("kind: measure", "kind: measuring", text)
    text = edit("gas: helium", "gas: neon", text)
    got = problems(write(tmp_path, text))
    assert [(ln, c) for ln, c, _ in got] == [pos(text, "format:"), pos(text, "kind:"), pos(text, "gas:")]
    assert "unknown gas 'neon'" in got[2][2]


def test_three_mistakes_give_three_problems(tmp_path: Path) -> None:
    text = edit("  target: 1.30 bar", "  target: 1.3 kg")
    text = edit("  window: 10 s", "  windw: 10 s", text)
    text = edit("  count: 8\n  discard: 2", "  count: 8\n  discard: 8", text)
    text = edit("    last: 3", "    last: 2", text)
    got = problems(write(tmp_path, text))
    assert [(ln, c) for ln, c, _ in got] == sorted([pos(text, "target: 1.3 kg"), pos(text, "windw"),
                                                    pos(text, "discard: 8")])


def test_not_a_mapping(tmp_path: Path) -> None:
    line, col, _ = only(write(tmp_path, "- just\n- a list\n"))
    assert (line, col) == (1, 1)


def test_empty_file(tmp_path: Path) -> None:
    assert only(write(tmp_path, ""))[:2] == (1, 1)


# ----------------------------------------------------------------------------- hostile files


def test_alias_bomb_rejected_at_first_anchor(tmp_path: Path) -> None:
    lines = ["format: pycnoctl-sequence/1", "name: bomb", "kind: measure", 'a: &a ["lol","lol","lol"]']
    for i in range(1, 9):  # the classic nine-level 'billion laughs'
        prev, cur = chr(ord("a") + i - 1), chr(ord("a") + i)
        lines.append(f"{cur}: &{cur} [" + ",".join([f"*{prev}"] * 9) + "]")
    text = "\n".join(lines) + "\n"
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "&a")
    assert "anchors are not allowed" in msg


def test_alias_alone_rejected(tmp_path: Path) -> None:
    text = GOOD + "other: *x\n"
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "*x")
    assert "aliases are not allowed" in msg


def test_python_tag_rejected(tmp_path: Path) -> None:
    text = edit("name: test-run", "name: !!python/object/apply:os.system ['true']")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "!!python")
    assert "is not allowed" in msg


def test_huge_file_rejected_before_parsing(tmp_path: Path) -> None:
    text = GOOD + "#" + "x" * MAX_BYTES + "\n"
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == (1, 1)
    assert str(MAX_BYTES) in msg


def test_non_utf8_position(tmp_path: Path) -> None:
    raw = edit("description: a sequence", "description: a s\xe9quence").encode("latin-1")
    line, col, msg = only(write(tmp_path, raw))
    i = raw.index(b"\xe9")
    assert (line, col) == (raw.count(b"\n", 0, i) + 1, i - raw.rfind(b"\n", 0, i))
    assert "UTF-8" in msg


def test_missing_file(tmp_path: Path) -> None:
    line, col, msg = only(tmp_path / "nope.yaml")
    assert (line, col) == (1, 1) and "cannot read" in msg


# ----------------------------------------------------------------------------- model built in code


def test_model_validate_applies_rules_without_a_file() -> None:
    base = {"format": sq.FORMAT, "name": "x", "kind": "measure", "fill": {"target": "1.3 bar"},
            "expand": {"volume": "small"}, "cycles": {"count": 3, "discard": 3}}
    with pytest.raises(ValidationError, match="discard"):
        sq.Sequence.model_validate(base)
    with pytest.raises(ValidationError, match="leak_check"):
        sq.Sequence.model_validate({**base, "cycles": {"count": 3}, "kind": "leak_check"})
    ok = sq.Sequence.model_validate({**base, "cycles": {"count": 3, "discard": 1}})
    assert ok.path is None and ok.raw_text is None and ok.doc is None


# ----------------------------------------------------------------------------- instrument checks


def _check(seq: sq.Sequence, max_bar: float = 2.0, **kw):  # type: ignore[no-untyped-def]
    return sq.check_against_instrument(seq, expansion_volumes=kw.pop("volumes", ["small", "large"]),
                                       max_pressure=max_bar * 1e5, gas=kw.pop("gas", "helium"), **kw)


def test_instrument_check_passes_good_file(tmp_path: Path) -> None:
    assert _check(sq.load_sequence(write(tmp_path, GOOD))) == ([], [])


def test_unknown_expansion_volume_positioned(tmp_path: Path) -> None:
    text = edit("  volume: auto", "  volume: medium")
    seq = sq.load_sequence(write(tmp_path, text))
    probs, _ = _check(seq)
    assert len(probs) == 1 and (probs[0].line, probs[0].col) == pos(text, "volume: medium")
    assert "small, large" in probs[0].message


def test_auto_volume_needs_some_volume(tmp_path: Path) -> None:
    probs, _ = _check(sq.load_sequence(write(tmp_path, GOOD)), volumes=[])
    assert len(probs) == 1


def test_fill_over_the_margin_positioned(tmp_path: Path) -> None:
    # max 2.0 bar, 10 % margin -> 1.8 bar allowed for target + overshoot (0.05 bar)
    text = edit("  target: 1.30 bar", "  target: 1.76 bar")
    seq = sq.load_sequence(write(tmp_path, text))
    probs, _ = _check(seq)
    assert [(p.line, p.col) for p in probs] == [pos(text, "target: 1.76")]
    assert "exceeds 1.8 bar" in probs[0].message


def test_fill_at_the_margin_passes(tmp_path: Path) -> None:
    seq = sq.load_sequence(write(tmp_path, edit("  target: 1.30 bar", "  target: 1.75 bar")))
    assert _check(seq)[0] == []
    assert _check(seq, margin=0.2)[0] != []  # 1.6 bar allowed


def test_purge_and_leak_pressures_checked(tmp_path: Path) -> None:
    text = edit("  pressure: 1.0 bar", "  pressure: 1.9 bar")
    text = edit("kind: measure", "kind: leak_check", text)
    text += "leak_check:\n  pressure: 2.2 bar\n  hold: 60 s\n  max_rate: 1 Pa/s\n"
    seq = sq.load_sequence(write(tmp_path, text))
    probs, _ = _check(seq)
    assert [(p.line, p.col) for p in probs] == [pos(text, "pressure: 1.9"), pos(text, "pressure: 2.2")]


def test_a_sequence_in_another_gas_than_the_instrument_supplies_is_refused(tmp_path: Path) -> None:
    seq = sq.load_sequence(write(tmp_path, GOOD))
    probs, warns = _check(seq, gas="nitrogen")
    assert len(probs) == 1 and warns == []
    assert "measures in helium" in probs[0].message and "plumbed for nitrogen" in probs[0].message
    assert probs[0].line == pos(GOOD, "gas: helium")[0]
    assert _check(seq, gas="He")[1] == []
    assert _check(seq, gas=None)[1] == []
    assert len(_check(seq, gas="unobtainium")[1]) == 1


def test_instrument_check_without_doc(tmp_path: Path) -> None:
    seq = sq.Sequence.model_validate({"format": sq.FORMAT, "name": "x", "kind": "measure",
                                      "fill": {"target": 1.9}, "expand": {"volume": "small"},
                                      "cycles": {"count": 2}})
    probs, _ = _check(seq)
    assert len(probs) == 1 and probs[0].file == "<sequence x>"


def test_instrument_check_rejects_nonsense_limits(tmp_path: Path) -> None:
    seq = sq.load_sequence(write(tmp_path, GOOD))
    for bad in (0.0, -1.0, math.nan, math.inf):
        with pytest.raises(ValueError):
            sq.check_against_instrument(seq, expansion_volumes=["small"], max_pressure=bad, gas=None)


def test_a_settle_window_of_fewer_than_three_samples_is_refused_at_its_key(tmp_path: Path) -> None:
    """The drift test fits a line to the window: its slope has a standard error from three samples on.
    At 0.1 s a 0.15 s window holds two (the base settle serves the zero and P1; P2 has its own 20 s)."""
    text = edit("  window: 10 s", "  window: 0.15 s")
    seq = sq.load_sequence(write(tmp_path, text))
    probs, _ = _check(seq, sample_period=0.1)
    assert [(p.line, p.col) for p in probs] == [pos(text, "window: 0.15")]
    assert probs[0].message == (
        "settle.window 0.15 s holds 2 samples at this instrument's sample period of 0.1 s; the settle's drift "
        "test fits a straight line and needs at least 3 samples for its slope to have a standard error: make "
        "the window at least 0.2 s")
    assert _check(seq)[0] == []  # without a sample period nothing says how many a window holds


def test_an_override_window_is_blamed_at_the_override(tmp_path: Path) -> None:
    # at one sample every 12 s the base 10 s window holds 1 sample and settle_expanded's 20 s holds 2
    seq = sq.load_sequence(write(tmp_path, GOOD))
    probs, _ = _check(seq, sample_period=12.0)
    assert [(p.line, p.col) for p in probs] == [pos(GOOD, "window: 10 s"), pos(GOOD, "window: 20 s")]
    assert probs[0].message.startswith("settle.window 10 s holds 1 sample at ")
    assert probs[1].message.startswith("settle_expanded.window 20 s holds 2 samples at ")
    assert all(p.message.endswith("make the window at least 24 s") for p in probs)


def test_a_window_of_two_sample_periods_passes(tmp_path: Path) -> None:
    seq = sq.load_sequence(write(tmp_path, edit("  window: 10 s", "  window: 0.2 s")))
    assert _check(seq, sample_period=0.1)[0] == []
    assert len(_check(seq, sample_period=0.11)[0]) == 1  # 0.2 s then holds 2


def test_only_the_settles_a_kind_runs_are_checked(tmp_path: Path) -> None:
    # a short base window that every override replaces is never used
    text = edit("  window: 10 s", "  window: 0.05 s")
    text = edit("settle_filled: {}", "settle_filled: {window: 1 s}\nsettle_baseline: {window: 1 s}", text)
    assert _check(sq.load_sequence(write(tmp_path, text)), sample_period=0.1)[0] == []
    # a leak check has no P2: a short settle_expanded is not its problem; a purge settles nothing
    leak = edit("kind: measure", "kind: leak_check", edit("  window: 20 s", "  window: 0.05 s"))
    leak += "leak_check:\n  pressure: 1.0 bar\n  hold: 60 s\n  max_rate: 1 Pa/s\n"
    assert _check(sq.load_sequence(write(tmp_path, leak, "leak.yaml")), sample_period=0.1)[0] == []
    purge = edit("kind: measure", "kind: purge", text)
    assert _check(sq.load_sequence(write(tmp_path, purge, "purge.yaml")), sample_period=10.0)[0] == []


# ----------------------------------------------------------------------------- duration, names


def test_estimate_duration_follows_its_documented_formula(tmp_path: Path) -> None:
    seq = sq.load_sequence(write(tmp_path, GOOD))
    purge = 3 * (5.0 + 2 + 3)  # pulses x (fill + hold + vent)
    filled = max(5, 10)  # max(min_time, window) of settle_filled
    expanded = max(5, 20)  # settle_expanded overrides window to 20 s
    baseline = max(5, 10)  # the baseline settle takes the base settle
    assert sq.estimate_duration(seq) == pytest.approx(purge + 8 * (5.0 + filled + expanded + 5 + baseline))
    # a typical settle replaces every settle, clamped to max_time
    assert sq.estimate_duration(seq, fill_time=2.0, settle_typical=1000.0) == pytest.approx(
        3 * (2.0 + 5) + 8 * (2.0 + 300 + 300 + 5 + 300))


def test_a_run_that_stops_once_converged_is_estimated_at_its_fewest_cycles_too() -> None:
    seq = sq.load_sequence(sq.resolve_sequence("grain-volume"))  # up to 8, stops once 3 agree, no discard
    assert sq.earliest_cycles(seq) == seq.cycles.discard + seq.cycles.converge.last == 3
    full, early = sq.estimate_duration(seq), sq.estimate_duration(seq, cycles=3)
    per_cycle = (full - early) / (seq.cycles.count - 3)
    assert early == pytest.approx(full - 5 * per_cycle) and early < full
    calib = sq.load_sequence(sq.resolve_sequence("calibration"))  # no early stop: every cycle runs
    assert sq.earliest_cycles(calib) == calib.cycles.count


def test_check_prints_both_static_estimates(capsys: pytest.CaptureFixture[str]) -> None:
    from pycnoctl.controller.cli.main import main

    assert main(["check", "grain-volume", "--no-dry-run"]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "for all 8 cycle(s);" in out and "if it stops after 3, as soon as its last cycles can agree" in out


def test_resolve_sequence(tmp_path: Path) -> None:
    shipped = sq.list_shipped()
    assert sq.resolve_sequence("quick-demo") == shipped["quick-demo"]
    assert sq.resolve_sequence("quick-demo.yaml") == shipped["quick-demo"]
    own = write(tmp_path, GOOD)
    assert sq.resolve_sequence(own) == own
    assert sq.resolve_sequence(str(own)) == own
    with pytest.raises(sq.SequenceNotFound, match="quick-demo"):
        sq.resolve_sequence("no-such-sequence")
    with pytest.raises(FileNotFoundError):
        sq.resolve_sequence(tmp_path / "missing.yaml")


# ----------------------------------------------------------------------------- found by the fuzzer


def test_nul_character_positioned(tmp_path: Path) -> None:
    text = edit("name: test-run", "name: test\x00run")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "\x00")
    assert "U+0000" in msg


def test_nul_after_carriage_return_counts_the_line_as_yaml_does(tmp_path: Path) -> None:
    # YAML 1.1 "line break characters" include a lone CR [M: section number from memory, 5.4], so the
    # NUL sits at line 2, column 1
    line, col, _ = only(write(tmp_path, "\r\x00"))
    assert (line, col) == (2, 1)


def test_tag_on_a_mapping_key_positioned(tmp_path: Path) -> None:
    text = edit("settle_filled: {}", "settle_filled: {!tag }")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "!tag")
    assert "!tag" in msg


def test_unknown_key_with_brackets_keeps_its_name(tmp_path: Path) -> None:
    text = GOOD + "([x]: 1\n"
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "([x]")
    assert msg == "unknown key '([x]'"


def test_non_text_key_positioned(tmp_path: Path) -> None:
    text = edit("  count: 8", "  count: 8\n  12: 3")
    line, col, msg = only(write(tmp_path, text))
    assert (line, col) == pos(text, "12: 3")
    assert "12" in msg


def test_file_edited_while_loading_is_refused(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = write(tmp_path, GOOD)
    real = sq.load_file

    def load_then_edit(p, **kw):  # type: ignore[no-untyped-def]
        doc = real(p, **kw)
        path.write_text(edit("  target: 1.30 bar", "  target: 1.70 bar"), encoding="utf-8")
        return doc

    monkeypatch.setattr(sq, "load_file", load_then_edit)
    line, col, msg = only(path)
    assert (line, col) == (1, 1) and "changed" in msg
