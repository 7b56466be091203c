"""`pycnoctl probe`: reads every sensor, switches nothing unless asked, never opens the inlet."""

from __future__ import annotations

import json
from importlib.resources import files
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.cli.probe import probe
from pycnoctl.controller.domain.devices import DeviceError
from pycnoctl.drivers.config import build_instrument, load_instrument_config

pytest.importorskip("pycnoctl.drivers.simulated")
SIMULATED = str(files("pycnoctl.drivers") / "instruments" / "simulated.yaml")


class Recorder:
    """Wraps a valve bank and records every command; can be told to fail after n commands."""

    def __init__(self, inner, fail_after: int | None = None):
        self.inner = inner
        self.calls: list[dict[str, bool]] = []
        self.fail_after = fail_after

    @property
    def valve_names(self):
        return self.inner.valve_names

    def set_valves(self, states):
        self.calls.append(dict(states))
        if self.fail_after is not None and len(self.calls) == self.fail_after + 1:
            raise DeviceError("recorder", "injected failure")  # one failure, mid-walk
        self.inner.set_valves(states)

    def commanded(self):
        return self.inner.commanded()

    def read_back(self):
        return self.inner.read_back()

    def close(self):
        self.inner.close()


def test_probe_cli_on_simulated_instrument(capsys):
    assert main(["probe", "--instrument", SIMULATED, "-n", "5"]) == 0
    out = capsys.readouterr().out
    assert "pressure" in out and "5/5" in out


def test_probe_json_switches_no_valve(capsys):
    cfg = load_instrument_config(SIMULATED)
    inst = build_instrument(cfg)
    rec = Recorder(inst.valves.inner)
    inst.valves.inner = rec
    report = probe(inst, count=4)
    assert rec.calls == []  # nothing switched without --exercise-valves
    assert report["sensors"]["pressure"]["valid"] == 4
    assert report["sensors"]["pressure"]["unit"] == "Pa"
    inst.close()
    assert main(["probe", "--instrument", SIMULATED, "-n", "3", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert set(data["sensors"]) >= {"pressure"} and "exercise" not in data["valves"]


def test_exercise_never_opens_inlet_and_ends_safe():
    inst = build_instrument(load_instrument_config(SIMULATED))
    rec = Recorder(inst.valves.inner)
    inst.valves.inner = rec
    report = probe(inst, count=2, exercise=True)
    inlet = inst.roles.inlet
    assert all(call.get(inlet) is not True for call in rec.calls)
    assert any(step.get("valve") == inlet and "skipped" in step for step in report["valves"]["exercise"])
    assert report["valves"]["exercise"][-1]["ok"] is True
    assert inst.valves.commanded() == {**inst.valves.commanded(), **inst.roles.safe_state()}
    inst.close()


def test_exercise_failure_still_asserts_safe_state():
    inst = build_instrument(load_instrument_config(SIMULATED))
    rec = Recorder(inst.valves.inner, fail_after=5)
    inst.valves.inner = rec
    steps = probe(inst, count=1, exercise=True)["valves"]["exercise"]
    assert any(s.get("error") == "recorder: injected failure" for s in steps)
    assert steps[-1] == {**steps[-1], "step": "safe state", "ok": True}
    safe = inst.roles.safe_state()
    assert {k: inst.valves.commanded()[k] for k in safe} == safe
    inst.close()


def test_probe_bad_config_is_exit_2(tmp_path: Path, capsys):
    p = tmp_path / "bad.yaml"
    p.write_text("name: x\nvalves: {kind: sim, colour: red}\npressure: {kind: sim}\n")
    assert main(["probe", "--instrument", str(p)]) == 2
    assert f"{p}:2:" in capsys.readouterr().err
