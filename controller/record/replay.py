"""Recompute a stored run from its raw trace, with no hardware.

The live engine decides each settle from the samples as they come; here the recorded samples of each
phase are fed, in order, through the same SettleDetector with the same start time, so the same rules
give the same numbers (a test checks it to the last digit), and other rules or a newer calibration
give what that run would have measured with them.  When a new rule would have waited longer than
the run did, the phase's last window is used and the cycle is flagged.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.maths import results
from pycnoctl.controller.maths.settle import SettleCriteria, SettleDetector, SettleStatus
from pycnoctl.controller.record.runfolder import StoredRun
from pycnoctl.controller.run.engine import CycleData, settled_u
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


def _criteria(settle: Any, u_p: float) -> SettleCriteria:
    max_drift = None if settle.max_drift == "auto" else float(settle.max_drift)
    return SettleCriteria(window=settle.window, max_drift=max_drift, min_time=settle.min_time,
                          max_time=settle.max_time, extrapolate=settle.extrapolate, u_p=u_p)


class _Replay:
    """The trace as the engine saw it: gauge pressure, ambient and temperature per row."""

    def __init__(self, run: StoredRun, pressure_is_gauge: bool) -> None:
        tr = run.trace
        self.t = tr["t"]
        self.state = tr["state"]
        valid = tr["pressure_valid"] == "valid"
        p = tr["pressure_pa"]
        self.ambient = tr["ambient_pa"]
        gauge = p if pressure_is_gauge else p - self.ambient
        self.gauge = np.where(valid, gauge, np.nan)
        t_valid = tr["temperature_valid"] == "valid"
        self.temp = np.where(t_valid, tr["temperature_k"], np.nan)

    def settle(self, ph: Phase, criteria: SettleCriteria) -> tuple[SettleDetector, list[int], bool]:
        """Feed one phase; returns the detector, the rows it saw, and whether it decided in time."""
        t0 = self.t[ph.start - 1] if ph.start > 0 else self.t[ph.start]
        det = SettleDetector(criteria, float(t0))
        seen: list[int] = []
        for i in range(ph.start, ph.stop):
            seen.append(i)
            if math.isfinite(self.gauge[i]) and det.feed(float(self.t[i]), float(self.gauge[i])) \
                    is not SettleStatus.WAITING:
                return det, seen, True
        return det, seen, False

    def mean_last(self, values: np.ndarray, rows: list[int], n: int = 20) -> float:
        picked = [float(values[i]) for i in rows if math.isfinite(values[i])][-n:]
        return sum(picked) / len(picked) if picked else math.nan


def reanalyze(run: StoredRun, sequence: Sequence, *, chambers: ChamberCalibration, gas: str,
              pressure_is_gauge: bool, pressure_u: float, temperature_u: float) -> Reanalysis:
    """Cycle volumes and the run result recomputed from the raw trace."""
    rp = _Replay(run, pressure_is_gauge)
    plist = phases(rp.state)
    cycles: list[CycleData] = []
    flags: list[str] = []
    zero: tuple[float, float, float, float] | None = None
    current: CycleData | None = None

    for k, ph in enumerate(plist):
        if ph.state == "baseline":
            det, rows, decided = rp.settle(ph, _criteria(sequence.settle_baseline, pressure_u))
            if not math.isfinite(det.estimate):
                zero = None
                continue
            if not decided:
                flags.append(f"baseline before fill {len(cycles) + 1}: not settled under these rules")
            valid_rows = [i for i in rows if math.isfinite(rp.gauge[i])]
            zero = (det.estimate, settled_u(det), rp.mean_last(rp.ambient, valid_rows),
                    rp.mean_last(rp.temp, valid_rows))
        elif ph.state == "fill":
            current = None
            if zero is not None:
                current = CycleData(index=len(cycles) + 1, volume_name="", baseline=zero[0],
                                    u_baseline=zero[1], ambient=zero[2], t_ambient=zero[3])
                cycles.append(current)
        elif ph.state in ("settle_filled", "settle_expanded") and current is not None:
            which = "1" if ph.state == "settle_filled" else "2"
            settle = sequence.settle_filled if which == "1" else sequence.settle_expanded
            det, rows, decided = rp.settle(ph, _criteria(settle, pressure_u))
            if not math.isfinite(det.estimate):
                continue
            if not decided:
                current.flags.append(f"unsettled_p{which}")
            temp = rp.mean_last(rp.temp, rows)
            values = (det.estimate - current.baseline, settled_u(det), temp, det.elapsed, det.drift)
            if which == "1":
                current.p1, current.u_p1, current.t1, current.settle1_time, current.drift1 = values
            else:
                current.p2, current.u_p2, current.t2, current.settle2_time, current.drift2 = values
                # the live run finished the cycle only if it went on to vent
                nxt = plist[k + 1].state if k + 1 < len(plist) else ""
                if nxt not in ("vent",):
                    current.p2 = math.nan
    out = []
    for cyc in cycles:
        if math.isfinite(cyc.p1) and math.isfinite(cyc.p2):
            out.append(results.cycle_result(cyc, chambers, gas=gas, u_p=pressure_u, u_t=temperature_u,
                                            discard=sequence.cycles.discard))
    res = results.run_result(out, converge=sequence.cycles.converge) if sequence.expands else None
    return Reanalysis(out, res, chambers, gas, flags)
