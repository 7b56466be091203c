"""Inputs that used to load without a word and would misread or switch off a protection: a gauge reply
pattern without its 'value' group or not a regex at all, an unknown gas in the instrument config, a
simulator that starts with the inlet and the vent open together, a fill time-out of 1e12 s, a transducer
read less often than its stale-reading limit allows (simulator, hardware, simulated instrument). Each is
refused at load with file:line:col, so by `check` and by `run` alike (exit 2, no traceback)."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.sim.config import DEFAULT_CONFIG

ROOT = Path(__file__).resolve().parents[1]
GAUGE = ROOT / "drivers" / "instruments" / "usb-relay-serial-gauge.yaml"
SIMULATED = ROOT / "drivers" / "instruments" / "simulated.yaml"
QUICK = ROOT / "sequences" / "quick-demo.yaml"
REGEX = r"  regex: '^P (?P<value>\S+) (?P<unit>\S+)$'"


def variant(tmp_path: Path, src: Path, old: str, new: str, name: str) -> Path:
    text = src.read_text(encoding="utf-8")
    assert old in text, f"{old!r} not in {src}"
    out = tmp_path / name
    out.write_text(text.replace(old, new, 1), encoding="utf-8")
    return out


def line_col(path: Path, needle: str) -> tuple[int, int]:
    for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        if needle in line:
            return n, len(line) - len(line.lstrip()) + 1
    raise AssertionError(f"{needle!r} not in {path}")


def cases(tmp_path: Path) -> list[tuple[str, list[str], Path, str, str]]:
    """(name, the argument that carries the file, the bad file, the key it must point at, words)."""
    nogroup = variant(tmp_path, GAUGE, REGEX, r"  regex: '^P (\S+) (?P<unit>\S+)$'", "nogroup.yaml")
    badrx = variant(tmp_path, GAUGE, REGEX, r"  regex: '^P (?P<value>\S+ (?P<unit>\S+)$'", "badrx.yaml")
    gas = tmp_path / "gas.yaml"
    gas.write_text(SIMULATED.read_text(encoding="utf-8") + "gas: unobtainium\n", encoding="utf-8")
    sim = variant(tmp_path, DEFAULT_CONFIG, "initial_open: [vent, exp_small, exp_large]",
                  "initial_open: [inlet, vent]", "sim.yaml")
    fill = variant(tmp_path, QUICK, "  timeout: 30 s\n  overshoot", "  timeout: 1e12 s\n  overshoot", "fill.yaml")
    slow_sim = variant(tmp_path, DEFAULT_CONFIG, "sample_period: 0.1 s", "sample_period: 2 s", "slow-sim.yaml")
    slow_gauge = variant(tmp_path, GAUGE, "sample_period: 0.1 s", "sample_period: 2 s", "slow-gauge.yaml")
    slow_simulated = variant(tmp_path, SIMULATED, "sample_period: 0.1 s", "sample_period: 2 s", "slow-simulated.yaml")
    stale = "is not shorter than the stale-reading limit, limits.stale_after 1 s"
    # found by a sweep: a settle given 1e9 s on a drifting lab never ended; a bound with no unit
    endless = variant(tmp_path, QUICK, "  max_time: 30 s", "  max_time: 1e9 s", "endless.yaml")
    # a sweep: a vented band of 50 kPa passed against the instrument's 270 kPa trip
    wide = variant(tmp_path, QUICK, "  baseline_tolerance: 1 kPa", "  baseline_tolerance: 50 kPa", "wide.yaml")
    return [
        ("gauge pattern without its group", ["--instrument", str(nogroup)], nogroup, "regex: '^P",
         "no group named 'value'"),
        ("gauge pattern not a regex", ["--instrument", str(badrx)], badrx, "regex: '^P", "invalid regular expression"),
        ("unknown gas", ["--instrument", str(gas)], gas, "gas:", "unknown gas 'unobtainium'"),
        ("inlet and vent open at start", ["--sim", str(sim)], sim, "initial_open:", "inlet and the vent"),
        ("fill time-out of 1e12 s", [], fill, "timeout: 1e12", "fill.timeout: 1e+12 s must be at most 3600 s"),
        ("settle of 1e9 s", [], endless, "max_time: 1e9", "settle.max_time: 1e+09 s must be at most 14400 s"),
        ("a vented band of 50 kPa", [], wide, "baseline_tolerance: 50", "at most a tenth of the instrument's"),
        # each used to load and fault with a stale-reading trip at the first tick
        ("simulator sampled slower than its stale limit", ["--sim", str(slow_sim)], slow_sim, "sample_period:", stale),
        ("hardware sampled slower than its stale limit", ["--instrument", str(slow_gauge)], slow_gauge,
         "sample_period:", stale),
        ("simulated instrument sampled slower than its simulator's stale limit", ["--instrument", str(slow_simulated)],
         slow_simulated, "sample_period:", stale),
    ]


@pytest.mark.parametrize("verb", ["check", "run"])
@pytest.mark.parametrize("index", range(10))
def test_refused_at_load_with_file_line_col(tmp_path, capsys, verb, index):
    name, opts, bad, key, words = cases(tmp_path)[index]
    seq = str(bad) if bad.name in ("fill.yaml", "endless.yaml", "wide.yaml") else "quick-demo"
    if verb == "run" and not opts:
        opts = ["--sim"]
    tail = ["--no-dry-run"] if verb == "check" else ["--quiet", "--data", str(tmp_path / "d")]
    args = [verb, seq, *opts, *tail]
    rc = main(args)
    out = capsys.readouterr()
    assert rc == 2, (name, out.err)
    assert "Traceback" not in out.err + out.out
    line, col = line_col(bad, key)
    hit = [ln for ln in out.err.splitlines() if words in ln]
    assert hit, (name, out.err)
    m = re.match(r"(.+):(\d+):(\d+): ", hit[0])
    assert m and Path(m.group(1)).name == bad.name and (int(m.group(2)), int(m.group(3))) == (line, col), hit[0]
    assert not (tmp_path / "d" / "runs").exists()  # nothing ran
