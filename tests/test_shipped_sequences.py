"""Shipped sequences load, pass the instrument checks for a 2.0 bar instrument, and match their README."""

from __future__ import annotations

import re
import typing
from pathlib import Path

import pytest
from pydantic import BaseModel

from pycnoctl.controller.run import sequence as sq

SHIPPED = ("calibration", "grain-volume", "leak-check", "purge-only", "quick-demo")
README = Path(__file__).resolve().parents[1] / "sequences" / "README.md"
MAX_PRESSURE = 2.0e5  # Pa gauge: the demo instrument's trip limit (relief near 2.5 bar)
DEMO_VOLUMES = ("small", "large")


def test_the_five_sequences_are_shipped() -> None:
    assert tuple(sq.list_shipped()) == SHIPPED


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_file_loads_and_fits_the_demo_instrument(name: str) -> None:
    seq = sq.load_sequence(sq.resolve_sequence(name))
    assert seq.name == name
    assert seq.format == sq.FORMAT
    problems, warnings = sq.check_against_instrument(
        seq, expansion_volumes=DEMO_VOLUMES, max_pressure=MAX_PRESSURE, gas="helium")
    assert problems == [] and warnings == []
    # the same rule written out: setpoint + overshoot <= 90 % of max_pressure (default 10 % margin)
    setpoints = []
    if seq.expands:
        setpoints.append(seq.fill.target)
    if seq.purge is not None and seq.purge.pulses:
        setpoints.append(seq.purge.pressure)
    if seq.leak_check is not None:
        setpoints.append(seq.leak_check.pressure)
    assert setpoints, "every shipped sequence pressurises something"
    assert all(p + seq.fill.overshoot <= 0.9 * MAX_PRESSURE for p in setpoints)
    assert sq.estimate_duration(seq) > 0


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_file_is_rejected_by_a_weaker_instrument(name: str) -> None:
    # at 1.1 bar max (0.99 bar allowed) every shipped setpoint of 1.0-1.3 bar + 0.05 bar fails:
    # shows the check is live for each file
    seq = sq.load_sequence(sq.resolve_sequence(name))
    problems, _ = sq.check_against_instrument(
        seq, expansion_volumes=DEMO_VOLUMES, max_pressure=1.1e5, gas="helium")
    assert problems
    assert all(p.file == str(seq.path) and p.line > 1 for p in problems)


def test_kinds_of_shipped_files() -> None:
    kinds = {n: sq.load_sequence(p).kind for n, p in sq.list_shipped().items()}
    assert kinds == {"calibration": "calibrate", "grain-volume": "measure", "leak-check": "leak_check",
                     "purge-only": "purge", "quick-demo": "measure"}


def test_calibration_serves_every_volume_with_the_measurement_fill() -> None:
    # methods note [M]: calibrate with the same gas and fill pressure as the runs, one per volume
    # ('auto': pycnoctl calibrate runs each volume of whatever instrument in turn)
    cal = sq.load_sequence(sq.resolve_sequence("calibration"))
    run = sq.load_sequence(sq.resolve_sequence("grain-volume"))
    assert cal.expand.volume == "auto" and cal.expand.sample_estimate is None
    assert (cal.gas, cal.fill.target) == (run.gas, run.fill.target)


def test_quick_demo_is_short() -> None:
    seq = sq.load_sequence(sq.resolve_sequence("quick-demo"))
    assert seq.cycles.count == 3
    assert seq.settle_filled.window <= 5 and seq.settle_expanded.window <= 5
    est = sq.estimate_duration(seq)
    assert 60 <= est <= 120, est
    # even with every settle running to max_time it stays a few minutes
    assert sq.estimate_duration(seq, settle_typical=seq.settle.max_time) <= 360


def _readme_example(tmp_path: Path) -> Path:
    text = README.read_text(encoding="utf-8")
    blocks = re.findall(r"```yaml\n(.*?)```", text, flags=re.S)
    example = next(b for b in blocks if b.startswith("format: pycnoctl-sequence/1"))
    path = tmp_path / "readme-example.yaml"
    path.write_text(example, encoding="utf-8")
    return path


def test_readme_example_is_the_shipped_grain_volume(tmp_path: Path) -> None:
    example = sq.load_sequence(_readme_example(tmp_path))
    shipped = sq.load_sequence(sq.resolve_sequence("grain-volume"))
    assert example.model_dump(exclude={"description"}) == shipped.model_dump(exclude={"description"})


def _keys(model: type[BaseModel], prefix: str = "") -> list[str]:
    out = []
    for name, info in model.model_fields.items():
        out.append(prefix + name)
        for t in (info.annotation, *typing.get_args(info.annotation)):
            if isinstance(t, type) and issubclass(t, BaseModel) and t is not sq.Sequence:
                out.extend(_keys(t, prefix + name + "."))
                break
    return out


def test_readme_documents_every_key() -> None:
    text = README.read_text(encoding="utf-8")
    missing = [k for k in _keys(sq.Sequence) if f"`{k.rsplit('.', 1)[-1]}`" not in text]
    assert missing == []


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_file_fits_the_clean_simulator(name: str) -> None:
    simulated = pytest.importorskip("pycnoctl.drivers.simulated")
    inst = simulated.build_sim_instrument(None)  # the clean demo instrument
    try:
        names, max_p, gas, period = list(inst.roles.expansion), inst.limits.max_pressure, inst.gas, inst.sample_period
    finally:
        inst.close()
    assert set(DEMO_VOLUMES) <= set(names)
    seq = sq.load_sequence(sq.resolve_sequence(name))
    assert sq.check_against_instrument(seq, expansion_volumes=names, max_pressure=max_p, gas=gas,
                                       sample_period=period) == ([], [])
