"""Fuzzing the sequence loader: whatever the bytes, the only failure is a positioned ConfigError.

Properties checked (hypothesis):
- random bytes, random YAML-ish text and random mutations of a valid file never raise anything
  but ConfigError;
- every problem of a rejected file points inside it (a line that exists, a column on that line,
  or the end of the file);
- a mutated file that is accepted still obeys every cross-field rule.

Figures: ``python tests/test_sequence_fuzz.py [N] [seed]`` mutates the shipped grain-volume file
N times and prints the crash count, the share of rejected files whose location points inside the
file, and the share whose first problem sits on the mutated line.
"""

from __future__ import annotations

import random
import re
import sys
import tempfile
from collections import Counter
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.controller.run import sequence as sq

VALID = sq.list_shipped()["grain-volume"].read_text(encoding="utf-8")

# PyYAML counts these as line breaks when it reports a mark
_YAML_BREAK = re.compile("\r\n|[\r\n\x85\u2028\u2029]")

TOKENS = [
    ":", ": ", "-", "- ", " ", "  ", "\n", "\t", "{", "}", "[", "]", ",", "#", "&a ", "*a",
    "!!python/object:os.system ", "!tag ", "'", '"', "|", ">", "?", "%", "@", "`", "\\", "\x00",
    "\x7f", "\r", "\ufeff", "é", "💥",
    "null", "~", "true", "yes", "0", "-1", "3.5", "1001", "1e999", "nan", "inf", "1.3 kg", "1.3 bar", "5 min",
    "0 s", "auto", "-0.2 bar", "99 %", "<<: ", "---\n", "...\n", "format: x\n", "kind: purge\n",
]
HOSTILE_VALUES = [
    "-1", "0", "1001", "51", "3.0", "'3'", "yes", "null", "~", "[]", "{}", "[1, 2]", "1.3 kg", "abc",
    "1e999 bar", "nan bar", "1 (", "1 kPa/0", "1 bar**bar", "2 min", "0.2 %", "20 %", "auto", "small",
    "!!python/object:os.system", "&x 1", "*x", "'unterminated", '"\\q"', "💥", "1.3 bar # fine", "10 min",
]


def mutate(text: str, rng: random.Random) -> tuple[str, int | None]:
    """One random edit; returns the new text and the 1-based line it touched (None if several)."""
    lines = text.split("\n")
    op = rng.randrange(8)
    i = rng.randrange(len(lines))
    if op == 0:  # delete a short span
        pos = rng.randrange(len(text) + 1)
        return text[:pos] + text[pos + rng.randint(1, 5):], text.count("\n", 0, pos) + 1
    if op == 1:  # insert a token
        pos = rng.randrange(len(text) + 1)
        return text[:pos] + rng.choice(TOKENS) + text[pos:], text.count("\n", 0, pos) + 1
    if op == 2:  # replace one character
        pos = rng.randrange(len(text))
        return text[:pos] + rng.choice(TOKENS)[:1] + text[pos + 1:], text.count("\n", 0, pos) + 1
    if op == 3:  # duplicate a line
        return "\n".join([*lines[: i + 1], lines[i], *lines[i + 1:]]), i + 2
    if op == 4:  # delete a line
        return "\n".join(lines[:i] + lines[i + 1:]), None
    if op == 5:  # swap two lines
        j = rng.randrange(len(lines))
        lines[i], lines[j] = lines[j], lines[i]
        return "\n".join(lines), None
    if op == 6:  # change a value
        m = re.match(r"^(\s*[\w-]+:\s)(.*)$", lines[i])
        if m:
            lines[i] = m.group(1) + rng.choice(HOSTILE_VALUES)
            return "\n".join(lines), i + 1
        return text, None
    # re-indent a line
    lines[i] = lines[i][2:] if lines[i].startswith("  ") and rng.random() < 0.5 else "  " + lines[i]
    return "\n".join(lines), i + 1


def inside(data: bytes, line: int, col: int) -> bool:
    """True when (line, col) is a position in the file: an existing line, a column on it or just past it."""
    try:
        rows = _YAML_BREAK.split(data.decode("utf-8"))
    except UnicodeDecodeError:
        rows = [r.decode("latin-1") for r in data.split(b"\n")]  # loader counts bytes here
    return 1 <= line <= len(rows) and 1 <= col <= len(rows[line - 1]) + 1


def load(path: Path, data: bytes) -> sq.Sequence | ConfigError:
    """Load bytes as a sequence file; returns the model or the ConfigError, lets anything else escape."""
    path.write_bytes(data)
    try:
        return sq.load_sequence(path)
    except ConfigError as exc:
        return exc


def assert_rules_hold(seq: sq.Sequence) -> None:
    c = seq.cycles
    assert 1 <= c.count <= 1000 and 0 <= c.discard < c.count
    if c.converge is not None:
        assert 2 <= c.converge.last <= c.count - c.discard and 0 < c.converge.within <= 0.1
    for s in (seq.settle, seq.settle_filled, seq.settle_expanded):
        assert 0 < s.window <= s.max_time and 0 <= s.min_time <= s.max_time
    assert 0 <= seq.fill.overshoot < seq.fill.target
    assert 0 < seq.vent.time <= seq.vent.timeout
    if seq.expands and seq.expand.volume == "auto":
        assert seq.expand.sample_estimate is not None
    if seq.kind == "leak_check":
        assert seq.leak_check is not None


def check(path: Path, data: bytes) -> None:
    out = load(path, data)
    if isinstance(out, ConfigError):
        assert out.problems
        for p in out.problems:
            assert inside(data, p.line, p.col), (p, data[:200])
    else:
        assert_rules_hold(out)


@pytest.fixture(scope="module")
def fuzz_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("fuzz") / "seq.yaml"


_SETTINGS = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@_SETTINGS
@given(data=st.binary(max_size=2048))
def test_random_bytes(fuzz_path: Path, data: bytes) -> None:
    check(fuzz_path, data)


@_SETTINGS
@given(text=st.text(alphabet=st.sampled_from(sorted(set("".join(TOKENS)) | set("abcdefgklmnst0123456789"))),
                    max_size=400))
def test_random_yamlish_text(fuzz_path: Path, text: str) -> None:
    check(fuzz_path, text.encode("utf-8"))


@_SETTINGS
@given(rng=st.randoms(use_true_random=False), n=st.integers(1, 3))
def test_mutations_of_a_valid_file(fuzz_path: Path, rng: random.Random, n: int) -> None:
    text = VALID
    for _ in range(n):
        text, _line = mutate(text, rng)
    check(fuzz_path, text.encode("utf-8", errors="surrogatepass"))


@_SETTINGS
@given(prefix=st.binary(max_size=64), cut=st.integers(0, len(VALID)))
def test_truncated_and_prefixed_files(fuzz_path: Path, prefix: bytes, cut: int) -> None:
    check(fuzz_path, prefix + VALID[:cut].encode("utf-8"))


def measure(n: int, seed: int, path: Path) -> Counter[str]:
    """Mutate the valid file n times (one edit each); count outcomes."""
    rng = random.Random(seed)
    tally: Counter[str] = Counter()
    for _ in range(n):
        text, line = mutate(VALID, rng)
        data = text.encode("utf-8")
        try:
            out = load(path, data)
        except Exception:  # the figure we want is how often this happens: it must stay 0
            tally["crash"] += 1
            continue
        if not isinstance(out, ConfigError):
            tally["accepted"] += 1
            continue
        tally["rejected"] += 1
        if all(inside(data, p.line, p.col) for p in out.problems):
            tally["inside"] += 1
        if line is not None:
            tally["single_line"] += 1
            if any(p.line == line for p in out.problems):
                tally["on_line"] += 1
    return tally


def report(t: Counter[str]) -> str:
    rej, one = t["rejected"] or 1, t["single_line"] or 1
    total = sum(t[k] for k in ("crash", "accepted", "rejected"))
    return (f"mutated files: {total}, accepted {t['accepted']}, rejected {t['rejected']}, crashes "
            f"{t['crash']}; rejected with every location inside the file: {t['inside']}/{t['rejected']} = "
            f"{t['inside'] / rej:.1%}; one-line edits reported on the edited line: "
            f"{t['on_line']}/{t['single_line']} = {t['on_line'] / one:.1%}")


def test_mutation_figures(fuzz_path: Path) -> None:
    t = measure(400, seed=20240601, path=fuzz_path)
    print("\n" + report(t))
    assert t["crash"] == 0
    assert t["rejected"] > 100  # the mutations do break files
    assert t["inside"] == t["rejected"]


if __name__ == "__main__":
    N = int(sys.argv[1]) if len(sys.argv) > 1 else 5000
    SEED = int(sys.argv[2]) if len(sys.argv) > 2 else 1
    with tempfile.TemporaryDirectory() as d:
        print(report(measure(N, SEED, Path(d) / "seq.yaml")))
