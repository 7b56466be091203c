"""Recompute a stored run from its raw trace, with no hardware.

The recorded rows, with the states the trace gives them, are fed in order through the same
CycleMeasurer the live engine fed while it ran, so the same rules give the same numbers (a test checks
it to the last digit on every shipped sequence and simulator), and other rules or a newer calibration
give what that run would have measured with them. When a new rule would have waited longer than the
run did, the phase's estimate at its end is used and the cycle is flagged.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field, replace

import numpy as np

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths import results
from pycnoctl.controller.maths.cycle import AmbientModel, CycleMeasurer, Row
from pycnoctl.controller.record.runfolder import StoredRun
from pycnoctl.controller.run.engine import cycle_plan, linearity_u
from pycnoctl.controller.run.sequence import Sequence


@dataclass
class Phase:
    """One stretch of the trace in one state: row indices [start, stop)."""

    state: str
    start: int
    stop: int


@dataclass
class Reanalysis:
    cycles: list[results.CycleResult]
    result: results.RunResult | None
    chambers: ChamberCalibration
    gas: str
    flags: list[str] = field(default_factory=list)


def phases(states: np.ndarray) -> list[Phase]:
    n = len(states)
    if n == 0:
        return []
    arr = np.asarray(states, dtype=object)
    starts = [0, *(np.flatnonzero(arr[1:] != arr[:-1]) + 1).tolist()]
    stops = [*starts[1:], n]
    return [Phase(str(states[a]), a, b) for a, b in zip(starts, stops, strict=True)]


#: the trace columns a replay reads (load_run(trace_columns=...) keeps only these)
REPLAY_COLUMNS = ("t", "state", "pressure_pa", "pressure_valid", "ambient_pa", "temperature_k", "temperature_valid")
_CHUNK = 65536  # rows turned into Python objects at a time: memory stays flat however long the trace


#: the flag of a cycle whose P1 or P2 did not settle under the re-analysing sequence's rules before the
#: recorded phase ended, where that sequence stops a run at such a settle (on_timeout: fault)
NOT_SETTLED_HERE = ("not settled under these rules before the recorded phase ended; this sequence "
                    "(on_timeout: fault) would have stopped the run there, so the cycle is left out")


def _under_these_rules(c: results.CycleResult, sequence: Sequence) -> results.CycleResult:
    """A cycle the re-analysing sequence would not have kept: a P1 or P2 that its rules had not decided when
    the recorded phase ended is taken (the trace holds no more) and flagged; where the sequence says
    ``on_timeout: fault`` the run would have stopped there, so the cycle is left out rather than stated
    (found by a sweep: re-analysis with such a sequence stated a result from three unsettled cycles)."""
    faults = [f"unsettled_{which}" for which, settle in (("p1", sequence.settle_filled),
                                                         ("p2", sequence.settle_expanded))
              if settle.on_timeout == "fault"]
    if not any(f in c.flags for f in faults):
        return c
    return replace(c, kept=False, flags=[*c.flags, NOT_SETTLED_HERE])


def rows(run: StoredRun, pressure_is_gauge: bool) -> Iterator[tuple[str, Row]]:
    """The trace as the engine saw it: (state, row) with the gauge pressure, NaN where invalid; made
    a chunk at a time from the numpy columns, so a 16-hour trace never exists as 577k Python rows."""
    tr = run.trace
    valid = tr["pressure_valid"] == "valid"
    p = tr["pressure_pa"]
    ambient = tr["ambient_pa"]
    gauge = np.where(valid, p if pressure_is_gauge else p - ambient, np.nan)
    temp = np.where(tr["temperature_valid"] == "valid", tr["temperature_k"], np.nan)
    states, times = tr["state"], tr["t"]
    for a in range(0, len(times), _CHUNK):
        b = a + _CHUNK
        for s, t, g, amb, k in zip(np.asarray(states[a:b]).tolist(), times[a:b].tolist(), gauge[a:b].tolist(),
                                   ambient[a:b].tolist(), temp[a:b].tolist(), strict=True):
            yield str(s), Row(t, g, amb, k)


def reanalyze(run: StoredRun, sequence: Sequence, *, chambers: ChamberCalibration, gas: str,
              pressure_is_gauge: bool, pressure_u: float, temperature_u: float,
              pressure_u_linearity: float | None = None, ambient: AmbientModel | None = None,
              thermometer: bool = False) -> Reanalysis:
    """Cycle volumes and the run result recomputed from the raw trace."""
    meter = CycleMeasurer(cycle_plan(sequence, chambers=chambers, gas=gas, u_p=pressure_u, u_t=temperature_u,
                                     volume_name="", u_p_sys=linearity_u(pressure_u, pressure_u_linearity),
                                     ambient=ambient, thermometer=thermometer))
    for state, row in rows(run, pressure_is_gauge):
        meter.feed(state, row)
    out = results.agreeing_only([_under_these_rules(c, sequence) for c in meter.results],
                                sequence.cycles.converge if sequence.expands else None)
    res = results.run_result(out, converge=sequence.cycles.converge) if sequence.expands else None
    return Reanalysis(out, res, chambers, gas, list(meter.notes))
