"""The live view: a pure function of the events, drawn at 80 and 120 columns, with a time left that
learns from the settle times the run shows (the static estimate is far off on a noisy gauge)."""

from __future__ import annotations

import io
import tempfile
from pathlib import Path
from typing import Any

import pytest
from rich.console import Console

from pycnoctl.controller.cli.display import Units
from pycnoctl.controller.cli.live import LiveModel, Plan, frame_line, render
from pycnoctl.controller.run.sequence import estimate_duration, load_sequence, resolve_sequence

SIM_CONFIGS = Path(__file__).resolve().parents[1] / "sim" / "configs"


def _plan() -> Plan:
    return Plan.from_sequence(load_sequence(resolve_sequence("grain-volume")))


def _text(renderable: Any, width: int) -> str:
    buf = io.StringIO()
    Console(file=buf, width=width, color_system=None, legacy_windows=False).print(renderable)
    return buf.getvalue()


SEQ = load_sequence(resolve_sequence("grain-volume"))
VENT = SEQ.vent.time  # s, the shipped sequence's vent


def _cycle(model: LiveModel, n: int, t: float, settle: float, *, kept: bool = True) -> float:
    """Feed one measurement cycle whose settles each take ``settle`` s; returns the time at its end."""
    for state, dur in (("vent", VENT), ("baseline", settle), ("fill", 5.0), ("settle_filled", settle),
                       ("expand", 0.1), ("settle_expanded", settle)):
        if state == "fill":
            model.apply("cycle", {"cycle": n}, t)
        model.apply("state", {"state": state, "t": t}, t)
        model.apply("sample", {"t": t, "gauge": 1.1e5, "state": state}, t)
        t += dur
    model.apply("cycle_done", {"cycle": n, "result": {
        "index": n, "p1_gauge_pa": 109_688.0, "p2_gauge_pa": 51_173.0, "volume_m3": 4.99989e-6,
        "u_volume_m3": 1.68e-9, "kept": kept, "flags": []}}, t)
    return t


@pytest.mark.parametrize("stops", [False, True])
def test_time_left_learns_from_the_settles_seen(stops: bool) -> None:
    plan = _plan()
    assert plan.stop_on_converge  # the shipped grain-volume stops once converged
    plan.stop_on_converge = stops
    m = LiveModel(plan)
    static_total = sum(m.plan.static.get(p, 0.0) for p in m.plan.timeline)
    # the purge at its static pace, then a first cycle whose settles take 300 s instead of ~10 s
    t = 0.0
    for state in m.plan.timeline[: m.plan.lead]:
        m.apply("state", {"state": state, "t": t}, t)
        t += m.plan.static[state]
    t = _cycle(m, 1, t, settle=300.0, kept=False)
    m.apply("state", {"state": "vent", "t": t}, t)
    left = m.left_instrument_s()
    assert left is not None
    # more cycles of vent + 3 x 300 + 5 + 0.1 s (the vent under way is the first), and the final vent:
    # seven when all eight cycles run; when the run may stop once converged, those up to the discarded
    # ones and the 3 that must agree, less the one done (it is expected to converge at its first chance)
    more = SEQ.cycles.discard + 3 - 1 if stops else SEQ.cycles.count - 1
    assert left == pytest.approx(more * (VENT + 900 + 5.1) + VENT, rel=1e-9)
    assert m.elapsed() + left > 5 * static_total  # far beyond the static estimate


def test_unseen_settle_is_expected_as_long_as_the_ones_seen() -> None:
    m = LiveModel(_plan())
    t = 0.0
    for state in m.plan.timeline[: m.plan.lead]:
        m.apply("state", {"state": state, "t": t}, t)
        t += m.plan.static[state]
    for state, dur in (("vent", 15.0), ("baseline", 200.0), ("fill", 5.0)):
        m.apply("state", {"state": state, "t": t}, t)
        t += dur
    m.apply("state", {"state": "settle_filled", "t": t}, t)
    assert m.expected("settle_expanded") == pytest.approx(200.0)  # the zero's settle, not the static 10 s


def test_wall_clock_pace() -> None:
    m = LiveModel(_plan())
    # the simulator at full speed: 100 instrument seconds pass in 1 wall second
    m.apply("sample", {"t": 0.0, "gauge": 0.0, "state": "purge_fill"}, 50.0)
    m.apply("state", {"state": "purge_fill", "t": 0.0}, 50.0)
    m.apply("sample", {"t": 100.0, "gauge": 0.0, "state": "purge_fill"}, 51.0)
    assert m.pace() == pytest.approx(0.01)
    assert m.left_wall_s() == pytest.approx(m.left_instrument_s() * 0.01)


def test_noisy_simulator_run_estimate_after_one_cycle() -> None:
    """The complaint: on the noisy simulator the old view said 176 s left 274 s into a 4574 s run.
    After one cycle the estimate of the whole run must be within 15 % of what it took."""
    from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
    from pycnoctl.controller.record.catalog import Catalog
    from pycnoctl.controller.run.control import Controller
    from pycnoctl.drivers.simulated import build_sim_instrument

    inst = build_sim_instrument(SIM_CONFIGS / "noisy.yaml")
    prep = prepare(RunRequest("grain-volume", sample_id="eta"), inst)
    model = LiveModel(Plan.from_sequence(prep.sequence))
    after_first: list[float] = []

    def on(kind: str, data: dict[str, Any]) -> None:
        t = data.get("t") if isinstance(data.get("t"), float) else model.t
        model.apply(kind, data, t or 0.0)  # wall = instrument time: pace 1, as on hardware
        if kind == "cycle_done" and data.get("cycle") == 1:
            after_first.append(model.elapsed() + (model.left_instrument_s() or 0.0))

    ctl = Controller(inst)
    ctl.listeners.append(on)
    with tempfile.TemporaryDirectory() as tmp:
        cat = Catalog(Path(tmp) / "catalog.sqlite")
        try:
            summary = execute(prep, ctl, root=Path(tmp) / "runs", catalog=cat)
        finally:
            cat.close()
            inst.close()
    actual = summary["instrument_time_s"]
    assert summary["status"] == "completed" and after_first
    assert abs(estimate_duration(prep.sequence) - actual) > 0.5 * actual  # the static figure is far off
    assert after_first[0] == pytest.approx(actual, rel=0.15)


@pytest.mark.parametrize("width", [80, 120])
def test_view_fits_the_terminal_and_shows_the_cycles(width: int) -> None:
    m = LiveModel(_plan(), run_id="R20261203T165143Z-96995c", simulated=True)
    t = 0.0
    for n in (1, 2, 3):
        t = _cycle(m, n, t, settle=10.0, kept=n > 2)
    m.apply("state", {"state": "settle_filled", "t": t}, t)
    m.apply("sample", {"t": t + 3, "gauge": 1.0969e5, "state": "settle_filled"}, t + 3)
    text = _text(render(m, Units()), width)
    lines = text.splitlines()
    assert all(len(line) <= width for line in lines)
    assert "R20261203T165143Z-96995c" in text and "SIMULATED" in text
    assert "1.09690 bar gauge" in text and "settle after fill (P1)" in text
    assert "purge > vent > zero > fill > [P1] > expand > P2" in text  # the phase strip, the current bracketed
    assert "4.99989" in text and "0.00168" in text  # volume and u of each cycle, whole
    assert "u is the standard uncertainty" in text
    assert "needs 3 kept cycles, has 1" in text
    assert "left" in text and "%" in text
    kpa = _text(render(m, Units("kPa")), width)
    assert "109.690 kPa gauge" in kpa


def test_convergence_words_follow_the_kept_cycles() -> None:
    m = LiveModel(_plan())
    t = 0.0
    for n in range(1, 6):
        t = _cycle(m, n, t, settle=10.0, kept=n > 2)
    assert m.convergence().startswith("converged: last 3 kept within 0 %")


def test_a_first_cycle_left_out_later_is_shown_not_kept() -> None:
    # the engine's cycle_done names earlier cycles no longer kept (a first cycle judged late)
    m = LiveModel(_plan())
    t = 0.0
    for n in range(1, 4):
        t = _cycle(m, n, t, settle=10.0)
    m.apply("cycle_done", {"cycle": 4, "result": {"index": 4, "volume_m3": 5e-6, "kept": True, "flags": []},
                           "left_out": [1]}, t)
    assert [c.kept for c in m.cycles] == [False, True, True, True]


def test_plain_frame_line_for_a_pipe() -> None:
    m = LiveModel(_plan(), run_id="R1")
    _cycle(m, 1, 0.0, settle=10.0)
    line = frame_line(m, Units("psi"))
    # 1.1 bar = 15.9542 psi (1 psi = 6894.757 Pa, scipy.constants.psi)
    assert line.startswith("R1 cycle 1 of 8: settle after expansion (P2) | 15.9542 psi gauge")


def test_watch_prints_plain_lines_without_a_terminal() -> None:
    from pycnoctl.controller.cli.client import WatchView

    snap = {"instrument": {"name": "demo"}, "activity": "idle", "state": "idle", "pressure": {}, "valves": {},
            "interlock": {}, "queue": {"length": 0}, "current_run": None, "last_run": None}
    view = WatchView(snap, Units(), every=10.0)
    out = view.feed("run_started", {"run_id": "R9", "sequence": "grain-volume", "kind": "measure",
                                    "cycles_total": 2, "expected_s": 100.0, "t_start": 0.0, "sample_id": "S1",
                                    "expansion_volume": "small"}, 0.0)
    assert out == ["run R9 started: grain-volume, sample S1, expansion volume small"]
    assert view.feed("sample", {"t": 1.0, "gauge_pa": 0.0, "state": "vent"}, 1.0)[0].startswith("R9 vent |")
    assert "judged when the run ends" in view.model.convergence()  # the daemon's brief has no rule
    assert view.feed("sample", {"t": 2.0, "gauge_pa": 0.0, "state": "vent"}, 2.0) == []  # nothing new
    assert view.feed("sample", {"t": 13.0, "gauge_pa": 0.0, "state": "vent"}, 13.0)  # --every passed
    done = view.feed("cycle_done", {"cycle": 1, "result": {"index": 1, "p1_gauge_pa": 1.1e5, "p2_gauge_pa": 5e4,
                                                           "volume_m3": 5e-6, "u_volume_m3": 1.7e-9, "kept": True,
                                                           "flags": []}}, 14.0)
    assert done == ["cycle 1: P1 1.10000 P2 0.50000 bar gauge, volume 5.00000 cm3, u 0.00170 cm3 (standard), kept"]
    end = view.feed("run_finished", {"run_id": "R9", "status": "completed", "volume_cm3": 5.0,
                                     "volume_u_cm3": 0.0014, "k": 2.0}, 20.0)
    assert end[-1] == "run R9 ended completed: volume 5.00000 +/- 0.00140 cm3 (expanded U, k = 2)"
    assert view.model is None
    text = _text(view.renderable(), 80)
    assert "demo" in text and all(len(line) <= 80 for line in text.splitlines())
